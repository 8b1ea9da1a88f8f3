"""Fits that explain themselves: identifiability from the null space of the
residual Jacobian, strong correlations and degrees of freedom in the text and
JSON output, profile-likelihood intervals. All data are invented (synthetic
curves of the models below with seeded noise)."""

import json
import math
import re

import numpy as np
import pytest

from treeflux.compiler import Scheme, compile_scheme
from treeflux.compiler.cli import main
from treeflux.runtime.errors import EvaluationError
from treeflux.runtime.fitting import combination_text, fit, identifiability

BINDING = """
name = "rapid-equilibrium binding (invented)"
[parameters]
kon  = { value = 1.0, min = 0.001, max = 1000.0 }
koff = { value = 1.0, min = 0.001, max = 1000.0 }
[inputs]
L = { value = 1.0 }
[[edges]]
source = "R"
target = "RL"
rate = "kon*L"
[[edges]]
source = "RL"
target = "R"
rate = "koff"
[observables]
bound = { "RL" = 1.0 }
"""

# Two sequential sites with statistical factors; the on-rates are known (no
# bounds), the off-rates are fitted: both identifiable from occupancy curves.
TWO_SITE = """
name = "two-site receptor (invented)"
[parameters]
kon1  = { value = 1.0 }
kon2  = { value = 1.0 }
koff1 = { value = 1.0, min = 0.01, max = 100.0 }
koff2 = { value = 1.0, min = 0.01, max = 100.0 }
[inputs]
L = { value = 1.0 }
[[edges]]
source = "R"
target = "RL"
rate = "2*kon1*L"
[[edges]]
source = "RL"
target = "R"
rate = "koff1"
[[edges]]
source = "RL"
target = "RL2"
rate = "kon2*L"
[[edges]]
source = "RL2"
target = "RL"
rate = "2*koff2"
[observables]
occupancy = { "RL" = 0.5, "RL2" = 1.0 }
"""


def _model(tmp_path, text, name):
    from treeflux.compiler import load
    path = tmp_path / f"{name}.toml"
    path.write_text(text)
    return path, compile_scheme(load(path))


def _binding_data(n=12, kd=2.0, noise=0.01, seed=1):
    # single-site rapid-equilibrium binding: bound fraction L/(L + Kd) (common practice)
    L = np.geomspace(0.01, 100, n)
    rng = np.random.default_rng(seed)
    return {"L": L, "bound": L / (L + kd) + noise * rng.standard_normal(n)}


def _csv(path, table):
    names = list(table)
    rows = zip(*[table[k] for k in names])
    path.write_text(",".join(names) + "\n" + "".join(",".join(repr(float(v)) for v in row) + "\n"
                                                     for row in rows))
    return path


def test_only_the_dissociation_constant_is_identifiable(tmp_path):
    _, m = _model(tmp_path, BINDING, "binding")
    r = fit(m, _binding_data())
    assert r["uncertainties"] == {"kon": None, "koff": None}
    ident = r["identifiability"]
    assert ident["message"] == "the data cannot identify kon*koff; only koff/kon is identifiable"
    assert [u["exponents"] for u in ident["unidentifiable"]] == [{"kon": 1, "koff": 1}]
    (kd,) = ident["identifiable"]
    assert kd["expression"] == "koff/kon" and kd["exponents"] == {"kon": -1, "koff": 1}
    # Kd itself is determined: close to the invented truth 2.0, with a finite error
    assert kd["value"] == pytest.approx(r["parameters"]["koff"] / r["parameters"]["kon"], rel=1e-12)
    assert abs(math.log(kd["value"] / 2.0)) < 4 * kd["log_uncertainty"]
    assert 0 < kd["log_uncertainty"] < 0.1
    assert ident["singular_values"][1] < 1e-6


def test_cli_names_the_ratio_and_opens_the_profile(tmp_path, capsys):
    path, _ = _model(tmp_path, BINDING, "binding")
    data = _csv(tmp_path / "binding.csv", _binding_data())
    assert main(["fit", str(path), str(data), "--profile", "koff"]) == 0
    out = capsys.readouterr().out
    assert "only koff/kon is identifiable" in out
    assert "kon              " in out and "(uncertainty undetermined)" in out
    assert re.search(r"koff/kon +[0-9.]+ \(standard error of its ln 0\.0", out)
    assert "degrees of freedom: 10 (12 residuals - 2 parameters)" in out
    # koff alone is not bounded above by the data: only by its max in the model
    assert "interval of koff: [" in out and ", open]" in out
    assert "out to the parameter's max 1000" in out
    assert main(["fit", str(path), str(data), "--profile", "kd", "--json"]) == 2
    assert "cannot profile 'kd'" in capsys.readouterr().err


def test_a_parameter_in_no_rate_is_named_and_the_others_stay_identifiable():
    s = Scheme()
    s.add_parameter("kon", value=1.0, min=0.01, max=100.0)
    s.add_parameter("kact", value=1.0, min=0.01, max=100.0)
    s.add_parameter("spare", value=1.0, min=0.1, max=10.0)
    s.add_input("c", value=1.0)
    s.add_edge("R", "RL", "kon*c")
    s.add_edge("RL", "R", "1.0")
    s.add_edge("RL", "RA", "kact")
    s.add_edge("RA", "RL", "1.0")
    s.add_observable("active", {"RA": 1.0})
    m = compile_scheme(s)
    c = np.geomspace(0.01, 100, 10)
    y = m.observables({"kon": 2.5, "kact": 4.0, "c": c})[:, 0]
    r = fit(m, {"c": c, "active": y + 0.01 * np.random.default_rng(2).standard_normal(10)})
    ident = r["identifiability"]
    assert [u["expression"] for u in ident["unidentifiable"]] == ["spare"]
    assert sorted(i["expression"] for i in ident["identifiable"]) == ["kact", "kon"]
    assert ident["individually_identifiable"] == ["kon", "kact"]
    assert "cannot identify spare" in ident["message"]


def test_combinations_are_named_with_small_integer_exponents_or_given_as_vectors():
    names = ["k1", "k2", "k3"]
    # residuals that depend on ln k1 - 2 ln k2 + ln k3 only: one identifiable combination
    J = np.outer(np.arange(1.0, 6.0), [1.0, -2.0, 1.0])
    ident = identifiability(J, names)
    assert [i["expression"] for i in ident["identifiable"]] == ["k1*k3/k2^2"]
    assert len(ident["unidentifiable"]) == 2
    # an irrational direction is not forced onto integers
    J = np.outer(np.arange(1.0, 6.0), [1.0, 1 / math.pi])
    (item,) = identifiability(J, ["a", "b"])["identifiable"]
    assert item["expression"] is None
    assert item["exponents"]["b"] == pytest.approx(1 / math.pi, abs=1e-4)
    assert combination_text([-1, 0, -2], names) == "1/(k1*k3^2)"
    # full rank: nothing unidentifiable
    ident = identifiability(np.array([[1.0, 0.0], [0.5, 2.0], [0.0, 1.0]]), ["a", "b"])
    assert ident["unidentifiable"] == [] and "all 2 parameters" in ident["message"]
    assert ident["poorly_identified"] == []
    # a direction 1e-5 weaker than the best: identifiable, but flagged as poorly determined
    ident = identifiability(np.array([[1.0, 1.0], [1e-5, -1e-5], [2.0, 2.0]]), ["kon", "koff"])
    assert ident["unidentifiable"] == []
    assert [w["expression"] for w in ident["poorly_identified"]] == ["koff/kon"]
    assert "poorly determined" in ident["message"] and "koff/kon" in ident["message"]


def test_profile_interval_agrees_with_wald_on_a_near_linear_problem(tmp_path):
    _, m = _model(tmp_path, TWO_SITE, "two_site")
    L = np.geomspace(0.01, 100, 15)
    y = m.observables({"koff1": 2.0, "koff2": 0.5, "L": L})[:, 0]
    data = {"L": L, "occupancy": y + 0.002 * np.random.default_rng(3).standard_normal(15)}
    r = fit(m, data, profile=["koff1", "koff2"])
    assert r["identifiability"]["unidentifiable"] == []
    for q in ("koff1", "koff2"):
        pr = r["profiles"][q]
        assert not pr["lower_open"] and not pr["upper_open"]
        best, (wl, wu) = r["parameters"][q], pr["wald_interval"]
        # Wald: θ̂ exp(± 1.96 σ_ln) with the reported standard error
        assert wu == pytest.approx(best * math.exp(1.959963984540054 * r["log_uncertainties"][q]))
        for end, wald in ((pr["lower"], wl), (pr["upper"], wu)):
            assert abs(math.log(end / best)) == pytest.approx(abs(math.log(wald / best)), rel=0.2)
        # at the ends the re-fitted cost has risen by the 95% chi-square threshold (3.841/2 · s²)
        assert pr["threshold_delta_cost"] == pytest.approx(0.5 * 3.841458820694124 * r["residual_variance"])
        pts = np.array(pr["points"])
        inside = (pts[:, 0] > pr["lower"] * (1 + 1e-6)) & (pts[:, 0] < pr["upper"] * (1 - 1e-6))
        assert np.all(pts[inside, 1] <= pr["threshold_delta_cost"] * (1 + 1e-6))
        assert np.all(pts[~inside, 1] >= pr["threshold_delta_cost"] * (1 - 1e-3))


def test_correlations_and_degrees_of_freedom_in_text_and_json(tmp_path, capsys):
    path, m = _model(tmp_path, TWO_SITE, "two_site")
    L = np.geomspace(0.3, 3, 15)          # a narrow range: the two off-rates trade off
    y = m.observables({"koff1": 2.0, "koff2": 0.5, "L": L})[:, 0]
    data = _csv(tmp_path / "occ.csv", {"L": L, "occupancy": y + 0.01 * np.random.default_rng(3).standard_normal(15)})
    assert main(["fit", str(path), str(data), "--json"]) == 0
    r = json.loads(capsys.readouterr().out)
    assert r["degrees_of_freedom"] == 13
    (c,) = r["correlations"]
    assert {c["a"], c["b"]} == {"koff1", "koff2"} and c["r"] < -0.9
    # the reported correlation is the one of the reported covariance
    cov = np.array(r["covariance_log"])
    assert c["r"] == pytest.approx(cov[0, 1] / math.sqrt(cov[0, 0] * cov[1, 1]), rel=1e-12)
    assert main(["fit", str(path), str(data)]) == 0
    out = capsys.readouterr().out
    assert "degrees of freedom: 13 (15 residuals - 2 parameters)" in out
    assert f"koff1 ~ koff2: {c['r']:+.4f}" in out
    assert "all 2 parameters are locally identifiable" in out


def test_profile_refusals(tmp_path):
    _, m = _model(tmp_path, BINDING, "binding")
    with pytest.raises(EvaluationError, match="cannot profile 'L'"):
        fit(m, _binding_data(), profile="L")
