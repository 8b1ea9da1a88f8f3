"""The `treeflux` command: JSON contract, exit status 2 with one line for bad input."""

import json
import subprocess
import sys
from pathlib import Path

import pytest

from treeflux.compiler.cli import main

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
PROMOTER = EXAMPLES / "promoter_two_activators.toml"
ENZYME = EXAMPLES / "enzyme_competitive_inhibitor.toml"


def run_json(capsys, *argv):
    assert main(list(argv)) == 0
    return json.loads(capsys.readouterr().out)


def test_profile_json_fields(capsys):
    prof = run_json(capsys, "profile", str(PROMOTER), "--json")
    for key in ("states", "edges", "strongly_connected", "terminal_components", "reversible",
                "detailed_balance", "trees", "method", "operations", "timings_s"):
        assert key in prof
    assert prof["edges"] == 24 and len(prof["states"]) == 8
    # The promoter's graph is the 3-cube: OEIS A091664 gives 384 spanning trees.
    assert set(prof["trees"].values()) == {"384"}
    assert prof["detailed_balance"] == "conditional"
    assert prof["method"] in ("elimination", "trees")
    assert prof["operations"]["total"] > 0
    assert prof["derivative_operations"]["total"] > prof["operations"]["total"]
    assert [p["pass"] for p in prof["passes"]][-1] == "compact"


def test_profile_non_reversible(capsys):
    prof = run_json(capsys, "profile", str(EXAMPLES / "proofreading_two_step.toml"), "--json")
    assert prof["reversible"] is False and prof["detailed_balance"] is False


def test_eval_json_matches_closed_form(capsys):
    # Competitive inhibition (common practice; e.g. Cornish-Bowden, Fundamentals
    # of Enzyme Kinetics): ES/E_total = S/(S + K_M (1 + I/K_I)),
    # K_M = (k_off + k_cat)/k_on, K_I = ki_off/ki_on.
    out = run_json(capsys, "eval", str(ENZYME), "--set", "S=20", "--set", "I=3", "--json")
    v = out["values"]
    km = (v["k_off"] + v["k_cat"]) / v["k_on"]
    ki = v["ki_off"] / v["ki_on"]
    expect = 20 / (20 + km * (1 + 3 / ki))
    assert abs(out["steady_state"]["ES"] - expect) <= 1e-13 * expect
    assert abs(out["observables"]["saturation"] - expect) <= 1e-13 * expect


def test_formula_and_compile(tmp_path, capsys):
    assert main(["formula", str(ENZYME), "--state", "ES"]) == 0
    assert "rho_ES = k_on*S/(k_off + k_cat)" in capsys.readouterr().out
    assert main(["compile", str(ENZYME), "--target", "python", "-o", str(tmp_path)]) == 0
    files = sorted(p.name for p in tmp_path.iterdir())
    stem = "hydrolase_with_a_competitive_inhibitor"
    assert files == [f"{stem}.layout.json", f"{stem}.py"]


@pytest.mark.parametrize("argv, fragment", [
    (["eval", "MISSING.toml"], "no such model file"),
    (["eval", str(ENZYME), "--set", "S"], "expected NAME=VALUE"),
    (["eval", str(ENZYME), "--set", "S=abc"], "not a number"),
    (["eval", str(ENZYME), "--set", "k_on=-1"], "must be positive"),
    (["eval", str(ENZYME), "--set", "nope=1"], "unknown symbol"),
    (["formula", str(ENZYME), "--state", "Q"], "unknown state"),
])
def test_bad_input_exit_2(argv, fragment, capsys):
    assert main(argv) == 2
    err = capsys.readouterr().err.strip()
    assert fragment in err and "\n" not in err and "Traceback" not in err


def test_console_script_bad_model(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text('[[edges]]\nsource = "A"\ntarget = "B"\nrate = "os.system(1)"\n')
    res = subprocess.run([sys.executable, "-m", "treeflux.compiler.cli", "profile", str(bad)],
                         capture_output=True, text=True)
    assert res.returncode == 2
    assert res.stderr.count("\n") == 1 and "bad.toml" in res.stderr and res.stdout == ""
