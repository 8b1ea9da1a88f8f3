"""examples/fit_enzyme_velocity.py runs as a user would run it (a fresh
interpreter in a temporary folder) and its fit recovers the values the
invented data were generated with."""

import os
import re
import subprocess
import sys
from pathlib import Path

SCRIPT = Path(__file__).resolve().parent.parent / "examples" / "fit_enzyme_velocity.py"


def test_enzyme_velocity_fit_script(tmp_path):
    env = dict(os.environ, TREEFLUX_CACHE_DIR=str(tmp_path / "cache"), MPLBACKEND="Agg")
    res = subprocess.run([sys.executable, str(SCRIPT), "fit.png"], cwd=tmp_path, env=env,
                         capture_output=True, text=True, timeout=600)
    assert res.returncode == 0, res.stderr
    out = res.stdout
    assert "Jacobian: compiled" in out
    found = {}
    for name in ("k_cat", "k_on", "Km"):
        m = re.search(rf"^\s*{name}\s+= ([0-9.eE+-]+) ± ([0-9.eE+-]+).*generated with ([0-9.eE+-]+)", out, re.M)
        assert m, out
        found[name] = tuple(float(x) for x in m.groups())
    for name, (value, err, truth) in found.items():
        # 3 % noise on 10 points: the fit lands within 4 standard errors and 5 %
        assert abs(value - truth) <= 4 * err and abs(value / truth - 1) < 0.05, (name, value, err, truth)
        assert 0 < err < 0.1 * value
    png = (tmp_path / "fit.png").read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n" and len(png) > 10_000
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".fit.png")] == []  # no leftovers


def test_enzyme_velocity_model_is_the_hyperbola_it_states():
    """The example's velocity against the closed form in its header: the
    Briggs-Haldane velocity (Briggs & Haldane 1925) with a product-release
    step, Vmax = E0·k_cat·k_rel/(k_cat + k_rel),
    Km = (k_off + k_cat)/k_on · k_rel/(k_cat + k_rel) (derived by hand, common practice)."""
    import numpy as np

    from treeflux.compiler import compile_scheme, load

    m = compile_scheme(load(SCRIPT.parent / "enzyme_velocity.toml"), cache=False)
    rng = np.random.default_rng(0)
    X = {k: 10 ** rng.uniform(-2, 2, 30) for k in m.symbols}
    O = m.observables(X)
    kc, kr = X["k_cat"], X["k_rel"]
    Vmax = X["E0"] * kc * kr / (kc + kr)
    Km = (X["k_off"] + kc) / X["k_on"] * kr / (kc + kr)
    names = m.observable_names
    np.testing.assert_allclose(O[:, names.index("velocity")], Vmax * X["S"] / (Km + X["S"]), rtol=1e-13)
    np.testing.assert_allclose(O[:, names.index("turnover")] * X["E0"], O[:, names.index("velocity")], rtol=1e-14)
