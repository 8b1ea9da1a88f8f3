"""`response` and `sample` overlay a scheme and its equilibrium restriction
(--compare-equilibrium) or a second model (--with OTHER.toml): both results
in the JSON, both curves / point clouds in one figure."""

import json
from pathlib import Path

import numpy as np
import pytest

from treeflux.compiler import compile_scheme, load
from treeflux.compiler.balance import equilibrium_restriction
from treeflux.compiler.cli import main
from treeflux.runtime.analysis import response_curve, sample

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
PROMOTER = EXAMPLES / "promoter_three_activators.toml"
RESPONSE = ["--observable", "polymerase_bound", "--input", "c", "--range", "0.01:10000"]


def _json(capsys, argv):
    assert main(argv) == 0
    return json.loads(capsys.readouterr().out)


def _png(path):
    data = Path(path).read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 10_000


def test_response_overlays_the_promoter_and_its_restriction(tmp_path, capsys):
    plot = tmp_path / "overlay.png"
    r = _json(capsys, ["response", str(PROMOTER), *RESPONSE, "--points", "41",
                       "--compare-equilibrium", "--plot", str(plot), "--json"])
    c = r["comparison"]
    assert c["kind"] == "equilibrium_restriction" and c["label"] == "equilibrium restriction"
    assert sorted(c["restricted_edges"]) == sorted(["AP->P", "BP->P", "CP->P", "ACP->AC", "BCP->BC",
                                                    "ABP->AB", "ABCP->ABC"])
    # the comparison is the restricted scheme's own response curve
    restricted = compile_scheme(equilibrium_restriction(load(PROMOTER)))
    direct = response_curve(restricted, observable="polymerase_bound", input="c", lo=0.01, hi=1e4, points=41)
    assert np.allclose(c["result"]["curve"]["y"], direct["curve"]["y"], rtol=1e-12, atol=0)
    # both start from the same empty-promoter limit (no activator: the restriction only
    # changes rates out of activator-bound states), but recruitment out of equilibrium
    # raises the saturated occupancy above the equilibrium one
    assert c["result"]["limits"]["lower"]["value"] == pytest.approx(r["limits"]["lower"]["value"], rel=1e-12)
    assert r["limits"]["upper"]["value"] > c["result"]["limits"]["upper"]["value"]
    _png(plot)
    assert main(["response", str(PROMOTER), *RESPONSE, "--compare-equilibrium"]) == 0
    out = capsys.readouterr().out
    assert "compared with the equilibrium restriction:" in out and out.count("hill_effective") == 2


def test_sampled_sharpness_of_the_restriction_obeys_the_equilibrium_bound(tmp_path, capsys):
    plot, out = tmp_path / "sharpness.png", tmp_path / "samples.csv"
    r = _json(capsys, ["sample", str(PROMOTER), "--n", "150", "--seed", "4", *RESPONSE, "--points", "31",
                       "--compare-equilibrium", "--plot", str(plot), "--out", str(out), "--json"])
    c = r["comparison"]
    assert c["paired"] is True and c["out"] == str(tmp_path / "samples.comparison.csv")
    eq = np.genfromtxt(c["out"], delimiter=",", names=True)
    main_table = np.genfromtxt(out, delimiter=",", names=True)
    # paired draws: the same parameter values row by row
    for name in r["ranges"]:
        assert np.array_equal(eq[name], main_table[name])
    h = eq["hill_effective"][np.isfinite(eq["hill_effective"])]
    assert h.size > 100
    # equilibrium bound (common practice): at detailed balance the occupancy of P is a
    # ratio of binding polynomials of degree 3 in c, so its effective Hill coefficient
    # cannot exceed the number of activator sites
    assert h.max() <= 3 + 1e-9
    assert c["summary"]["hill_effective"]["max"] == pytest.approx(h.max(), rel=1e-12)
    # the comparison table is the restriction sampled on its own with the same seed
    restricted = compile_scheme(equilibrium_restriction(load(PROMOTER)))
    direct = sample(restricted, 150, seed=4, response={"observable": "polymerase_bound", "input": "c",
                                                       "lo": 0.01, "hi": 1e4, "points": 31})
    col = direct["columns"].index("hill_effective")
    assert np.allclose(direct["data"][:, col], eq["hill_effective"], equal_nan=True, rtol=1e-12)
    _png(plot)


def test_with_overlays_a_second_model_file(tmp_path, capsys):
    composed = EXAMPLES / "promoter_three_activators_composed.toml"
    r = _json(capsys, ["response", str(PROMOTER), *RESPONSE, "--with", str(composed), "--json"])
    c = r["comparison"]
    assert c["kind"] == "model" and c["model"] == str(composed)
    # the composed description is the same scheme: the same curve
    assert np.allclose(c["result"]["curve"]["y"], r["curve"]["y"], rtol=1e-12)
    r = _json(capsys, ["sample", str(PROMOTER), "--n", "20", "--with", str(composed), "--json"])
    assert r["comparison"]["summary"]["polymerase_bound"]["median"] == pytest.approx(
        r["summary"]["polymerase_bound"]["median"], rel=1e-12)


def test_comparison_refusals(tmp_path, capsys):
    proof = EXAMPLES / "proofreading_two_step.toml"
    assert main(["response", str(proof), "--observable", "right_product", "--input", "R",
                 "--range", "0.01:100", "--compare-equilibrium"]) == 2
    err = capsys.readouterr().err
    assert "no reverse edge" in err and len(err.strip().splitlines()) == 1
    assert main(["response", str(PROMOTER), *RESPONSE, "--with", str(proof)]) == 2
    err = capsys.readouterr().err
    assert str(proof) in err and "unknown input 'c'" in err
    # argparse: the two options exclude each other (one line, exit 2)
    assert main(["response", str(PROMOTER), *RESPONSE, "--with", str(proof), "--compare-equilibrium"]) == 2
    assert "not allowed with argument" in capsys.readouterr().err
