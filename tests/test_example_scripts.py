"""The workflow scripts in examples/ run as a user would run them: in a fresh
folder, in a fresh interpreter, with a small size; each exits 0, prints its
RESULT line and writes its figure (a PNG)."""

import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
NUMBER = r"(-?[0-9.]+(?:e[-+]?\d+)?)"


def _run(tmp_path, script, size):
    env = dict(os.environ, MPLBACKEND="Agg", TREEFLUX_EXAMPLE_SAMPLES=str(size))
    proc = subprocess.run([sys.executable, str(EXAMPLES / script)], cwd=tmp_path, env=env,
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    lines = [ln for ln in proc.stdout.splitlines() if ln.startswith("RESULT ")]
    assert len(lines) == 1, proc.stdout
    png = tmp_path / script.replace(".py", ".png")
    data = png.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 20_000
    assert [p.name for p in tmp_path.iterdir()] == [png.name]     # nothing else left behind
    assert "model predictions" in lines[0]
    return lines[0]


def test_promoter_sharpness_map(tmp_path):
    line = _run(tmp_path, "promoter_sharpness_map.py", 120)
    m = re.search(rf"median {NUMBER}, max {NUMBER} out of equilibrium; "
                  rf"median {NUMBER}, max {NUMBER} at detailed balance \(bound 3\)", line)
    assert m, line
    driven_max, eq_median, eq_max = float(m.group(2)), float(m.group(3)), float(m.group(4))
    # equilibrium bound (common practice): at most the number of activator sites
    assert eq_max <= 3 + 1e-9
    # positive cooperativity (w >= 1) at equilibrium sharpens, never flattens: n_H >= 1
    assert eq_median >= 1.0
    # energy-driven recruitment reaches sharper curves than its equilibrium restriction here
    assert driven_max > eq_max


def test_proofreading_error_dissipation(tmp_path):
    line = _run(tmp_path, "proofreading_error_dissipation.py", 9)
    m = re.search(rf"error fraction {NUMBER} at equilibrium -> {NUMBER} at", line)
    assert m, line
    # at Δμ = 0 the scheme is at detailed balance: p(EXa)/p(E) = k_on·X/k_off_x, so with
    # R = W = 1, k_on = 1, k_off_r = 1, k_off_w = 100 the error is (1/100)/(1 + 1/100) = 1/101
    assert float(m.group(1)) == pytest.approx(1 / 101, rel=1e-3)
    assert float(m.group(2)) < float(m.group(1)) / 10          # driving buys accuracy
    assert float(re.search(rf"cycle-sum check agrees to {NUMBER}", line).group(1)) < 1e-10


def test_channel_voltage(tmp_path):
    line = _run(tmp_path, "channel_voltage.py", 61)
    assert float(re.search(rf"from the closed form {NUMBER}", line).group(1)) < 1e-12
    v_half = float(re.search(rf"V_half {NUMBER} mV", line).group(1))
    assert -120 < v_half < 60
