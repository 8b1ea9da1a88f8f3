"""The analysis subcommands of `treeflux` (response, thermo, passage, sample,
fit), run through treeflux.compiler.cli.main with --json, and their refusals."""

import json
import math
import sys

import numpy as np
import pytest

from treeflux.compiler import compile_scheme, load
from treeflux.compiler.cli import main
from treeflux.runtime.analysis import sample

# An invented two-state switch turned on by a signal s.
SWITCH = """
name = "signal switch"

[parameters]
kon  = { value = 2.0, min = 0.05, max = 50.0 }
koff = { value = 4.0 }

[inputs]
s = { value = 1.0 }

[[edges]]
source = "Off"
target = "On"
rate = "kon*s"

[[edges]]
source = "On"
target = "Off"
rate = "koff"

[observables]
on = { "On" = 1.0 }
"""

RING = """
name = "driven ring"

[parameters]
kp = { value = 3.0 }
km = { value = 1.0 }

[[edges]]
source = "A"
target = "B"
rate = "kp"

[[edges]]
source = "B"
target = "C"
rate = "kp"

[[edges]]
source = "C"
target = "A"
rate = "kp"

[[edges]]
source = "B"
target = "A"
rate = "km"

[[edges]]
source = "C"
target = "B"
rate = "km"

[[edges]]
source = "A"
target = "C"
rate = "km"
"""


@pytest.fixture
def files(tmp_path):
    sw = tmp_path / "switch.toml"
    sw.write_text(SWITCH)
    rg = tmp_path / "ring.toml"
    rg.write_text(RING)
    return sw, rg, tmp_path


def run_json(capsys, argv):
    status = main(argv)
    out = capsys.readouterr()
    assert status == 0, out.err
    return json.loads(out.out)


def refused(capsys, argv):
    status = main(argv)
    out = capsys.readouterr()
    assert status == 2
    lines = out.err.strip().splitlines()
    assert len(lines) == 1
    return lines[0]


def test_response_json(files, capsys):
    sw, _, _ = files
    r = run_json(capsys, ["response", str(sw), "--observable", "on", "--input", "s",
                          "--range", "1e-3:1e3", "--points", "31", "--json"])
    for key in ("input", "observable", "curve", "ec10", "ec50", "ec90", "hill_effective", "max_slope",
                "max_slope_at", "max_log_slope", "max_log_slope_at", "hill_fit"):
        assert key in r
    assert len(r["curve"]["x"]) == len(r["curve"]["y"]) == 31
    # p_On = s/(K + s), K = koff/kon = 2 (single-site form, common practice), normalized to its
    # limits 0 and 1: EC50 = K and n_H = 1 (Goldbeter & Koshland, PNAS 78 (1981) 6840)
    assert r["ec50"] == pytest.approx(2.0, rel=1e-10)
    assert r["hill_effective"] == pytest.approx(1.0, abs=1e-9)
    assert r["normalization"] == "limits" and r["monotone"] is True
    assert "not measurements" in r["note"]
    r2 = run_json(capsys, ["response", str(sw), "--observable", "on", "--input", "s",
                           "--range", "1e-3:1e3", "--set", "kon=8", "--json"])
    assert r2["ec50"] == pytest.approx(0.5, rel=1e-10)
    assert r2["values"]["kon"] == 8.0


def test_thermo_json(files, capsys):
    _, rg, _ = files
    r = run_json(capsys, ["thermo", str(rg), "--json"])
    # uniform driven ring: σ = (k+ − k−) ln(k+/k−) (Schnakenberg, Rev. Mod. Phys. 48 (1976) 571)
    assert r["entropy_production"] == pytest.approx(2 * math.log(3), rel=1e-13)
    assert r["fluxes"] == pytest.approx({"A->B": 2 / 3, "B->C": 2 / 3, "C->A": 2 / 3}, rel=1e-13)
    assert r["affinities"][0]["affinity"] == pytest.approx(3 * math.log(3), rel=1e-13)
    db = r["detailed_balance"]
    assert db["verdict"] == "conditional" and len(db["conditions"]) == 1
    assert db["holds_at_values"] is False
    eq = run_json(capsys, ["thermo", str(rg), "--set", "km=3", "--json"])
    assert eq["entropy_production"] == 0.0 and eq["detailed_balance"]["holds_at_values"] is True


def test_thermo_one_way_edge_reports_infinite_production(files, capsys):
    _, rg, tmp = files
    one_way = tmp / "oneway.toml"
    one_way.write_text(RING.replace('[[edges]]\nsource = "A"\ntarget = "C"\nrate = "km"\n', ""))
    r = run_json(capsys, ["thermo", str(one_way), "--json"])
    assert r["entropy_production"] is None
    assert "C->A" in r["entropy_production_note"]
    assert r["detailed_balance"]["verdict"] is False


def test_passage_json(files, capsys):
    sw, rg, _ = files
    r = run_json(capsys, ["passage", str(sw), "--from", "Off", "--to", "On", "--set", "s=0.5", "--json"])
    assert r["mean_time"] == pytest.approx(1 / (2.0 * 0.5), rel=1e-15)    # two-state: 1/k
    # ring A→{B, C}: leaving A at rate kp + km ends the passage at once
    r = run_json(capsys, ["passage", str(rg), "--from", "A", "--to", "B,C", "--json"])
    assert r["mean_time"] == pytest.approx(1 / 4.0, rel=1e-15)
    assert r["targets"] == ["B", "C"]


def test_sample_csv_workers_and_json(files, capsys):
    sw, _, tmp = files
    out = tmp / "samples.csv"
    status = main(["sample", str(sw), "--n", "50", "--seed", "3", "--workers", "2", "--out", str(out)])
    capsys.readouterr()
    assert status == 0
    header = out.read_text().splitlines()[0].split(",")
    data = np.loadtxt(out, delimiter=",", skiprows=1)
    ref = sample(compile_scheme(load(sw)), 50, seed=3)
    assert header == ref["columns"] == ["kon", "koff", "p_Off", "p_On", "on"]
    assert np.array_equal(data, ref["data"])
    r = run_json(capsys, ["sample", str(sw), "--n", "40", "--observable", "on", "--input", "s",
                          "--range", "1e-4:1e4", "--json"])
    assert r["columns"][-10:][:4] == ["ec10", "ec50", "ec90", "hill_effective"]
    assert r["columns"][-1] == "saturated"
    # curve statistics are over the curves that saturated within the range only
    curves = r["curves"]
    assert curves["saturated"] + curves["unsaturated"] + curves["flat"] == 40
    assert r["summary"]["hill_effective"]["count"] == curves["saturated"]
    rows = np.array(r["rows"], dtype=float)
    # every sample is single-site binding s/(K + s), K = koff/kon: normalized to its limits
    # 0 and 1, EC_q = K q/(1 - q), then n_H = ln 81 / ln(ec90/ec10) (Goldbeter & Koshland, PNAS 78 (1981) 6840)
    K = rows[:, 1] / rows[:, 0]
    ec = {}
    for q in (0.1, 0.5, 0.9):
        ec[q] = K * q / (1 - q)
        np.testing.assert_allclose(rows[:, r["columns"].index(f"ec{int(100 * q)}")], ec[q], rtol=1e-9)
    np.testing.assert_allclose(rows[:, r["columns"].index("hill_effective")],
                               math.log(81) / np.log(ec[0.9] / ec[0.1]), rtol=1e-8)


def test_fit_json(files, capsys):
    sw, _, tmp = files
    m = compile_scheme(load(sw))
    conc = np.geomspace(0.01, 100, 14)
    y = m.observables({"kon": 0.7, "s": conc})[:, 0]
    noise = 0.01 * np.random.default_rng(9).standard_normal(len(conc))
    path = tmp / "switch.csv"
    path.write_text("s,on\n" + "".join(f"{float(c)!r},{float(v)!r}\n" for c, v in zip(conc, y + noise)))
    r = run_json(capsys, ["fit", str(sw), str(path), "--json"])
    assert list(r["parameters"]) == ["kon"]        # the only parameter with bounds
    assert abs(r["parameters"]["kon"] - 0.7) <= 3 * r["uncertainties"]["kon"]
    assert r["cost"] > 0 and "residual variance" in r["uncertainty_method"]


@pytest.mark.parametrize("argv, fragment", [
    (["response", "{sw}", "--observable", "nope", "--input", "s", "--range", "1:10"], "unknown observable 'nope'"),
    (["response", "{sw}", "--observable", "on", "--input", "z", "--range", "1:10"], "unknown input 'z'"),
    (["response", "{sw}", "--observable", "on", "--input", "s", "--range", "10:1"], "bad range '10:1'"),
    (["response", "{sw}", "--observable", "on", "--input", "s", "--range", "abc"], "bad range 'abc'"),
    (["response", "{sw}", "--observable", "on", "--input", "s", "--range", "-1:1"],
     "input 's' cannot be negative"),
    (["response", "{sw}", "--observable", "on", "--input", "s", "--range", "1:10", "--set", "kon"],
     "expected NAME=VALUE"),
    (["passage", "{sw}", "--from", "Off", "--to", "Nowhere"], "unknown state 'Nowhere'"),
    (["sample", "{sw}", "--n", "5", "--observable", "on"], "go together"),
    (["thermo", "{sw}", "--set", "kon=-1"], "must be positive"),
    (["thermo", "{dir}/missing.toml"], "missing.toml"),
])
def test_bad_input_exits_2_with_one_line(files, capsys, argv, fragment):
    sw, _, tmp = files
    argv = [a.format(sw=sw, dir=tmp) for a in argv]
    line = refused(capsys, argv)
    assert fragment in line


def test_plot_without_matplotlib_is_a_clear_error(files, capsys, monkeypatch):
    sw, _, tmp = files
    monkeypatch.setitem(sys.modules, "matplotlib", None)      # as if the optional extra were absent
    line = refused(capsys, ["response", str(sw), "--observable", "on", "--input", "s",
                            "--range", "1:10", "--plot", str(tmp / "x.png")])
    assert "matplotlib" in line and "not installed" in line
    assert not (tmp / "x.png").exists()


def test_fit_refuses_unknown_columns(files, capsys):
    sw, _, tmp = files
    path = tmp / "bad.csv"
    path.write_text("s,on,mystery\n1,0.3,2\n")
    assert "column 'mystery'" in refused(capsys, ["fit", str(sw), str(path)])


def test_plots_are_written_as_png(files, capsys):
    # matplotlib is in the test extra; the files must be real PNGs (magic bytes
    # from the PNG specification, ISO/IEC 15948).
    sw, _, tmp = files
    resp, samp = tmp / "response.png", tmp / "samples.png"
    assert main(["response", str(sw), "--observable", "on", "--input", "s",
                 "--range", "1e-3:1e3", "--plot", str(resp)]) == 0
    assert main(["sample", str(sw), "--n", "40", "--observable", "on", "--input", "s",
                 "--range", "1e-3:1e3", "--out", str(tmp / "s.csv"), "--plot", str(samp)]) == 0
    capsys.readouterr()
    for path in (resp, samp):
        data = path.read_bytes()
        assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 5000
