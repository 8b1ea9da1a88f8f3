"""Splitting (absorption) probabilities and passage times with zero rates.

References: mpmath linear solves of the first-step equations at 50+ digits
(Σ_j ℓ(i→j)(h_j − h_i) = 0 on transient states, h = 1 on the group, 0 on
the other absorbing states), and the gambler's-ruin closed form
h_i = (r^i − 1)/(r^N − 1), r = μ/λ, for a birth–death chain absorbed at 0
and N (from memory; common textbook result), evaluated in exact Fractions.
"""

import json
import random
from fractions import Fraction

import mpmath
import numpy as np
import pytest

from treeflux.compiler import Scheme, compile_scheme
from treeflux.compiler.cli import main
from treeflux.runtime.analysis import absorption, absorption_probabilities, mean_first_passage, passage_times
from treeflux.runtime.errors import EvaluationError

from .schemes import random_strong_graph


def mp_splitting(n, edges, rates, source, groups, dps=60):
    """Probability of reaching each group first (mpmath LU solve at ``dps`` digits)."""
    owner = {t: g for g, members in enumerate(groups) for t in members}
    with mpmath.workdps(dps):
        trans = [s for s in range(n) if s not in owner]
        pos = {s: a for a, s in enumerate(trans)}
        out = []
        for g in range(len(groups)):
            A = mpmath.zeros(len(trans), len(trans))
            b = mpmath.zeros(len(trans), 1)
            for (i, j), k in zip(edges, rates):
                if i not in pos:
                    continue
                k = mpmath.mpf(float(k))
                A[pos[i], pos[i]] -= k
                if j in pos:
                    A[pos[i], pos[j]] += k
                elif owner[j] == g:
                    b[pos[i]] -= k
            h = mpmath.lu_solve(A, b)
            out.append(h[pos[source]])
        return out


def absorbing_graph(n, extra, n_targets, seed):
    """A random strongly connected graph whose last n_targets states have their
    out-edges removed (absorbing); every state still reaches a target."""
    rnd = random.Random(seed)
    edges = [e for e in random_strong_graph(n, extra=extra, rng=rnd) if e[0] < n - n_targets]
    return edges, [[t] for t in range(n - n_targets, n)]


@pytest.mark.parametrize("decades", [3, 12, 40])
@pytest.mark.parametrize("seed", range(4))
def test_splitting_against_mpmath(decades, seed):
    n = 10
    edges, groups = absorbing_graph(n, 12, 3, seed)
    rng = np.random.default_rng(seed)
    rates = 10 ** rng.uniform(-decades, decades, len(edges))
    got = absorption(n, edges, rates, source=0, groups=groups)[0]
    ref = mp_splitting(n, edges, rates, 0, groups, dps=60 + 2 * decades)
    for g, h in zip(got[:-1], ref):
        assert g == pytest.approx(float(h), rel=1e-12, abs=1e-300)   # small ones too, relatively
    assert got[-1] == 0.0                                           # every state reaches a target


def test_tiny_splitting_probability_keeps_relative_accuracy():
    # birth–death chain 0..N, up λ, down μ, absorbed at 0 and N, started at 1:
    # h_N = (r − 1)/(r^N − 1), r = μ/λ (gambler's ruin), exact in Fractions
    N, lam, mu = 12, 1e-3, 10.0
    edges, rates = [], []
    for i in range(1, N):
        edges += [(i, i + 1), (i, i - 1)]
        rates += [lam, mu]
    got = absorption(N + 1, edges, rates, source=1, groups=[[N], [0]])[0]
    r = Fraction(mu) / Fraction(lam)
    exact = (r - 1) / (r ** N - 1)
    assert float(exact) < 1e-44
    assert got[0] == pytest.approx(float(exact), rel=1e-13)
    assert got[1] == pytest.approx(float(1 - exact), rel=1e-15)


def test_target_sets_and_terminal_components_by_default():
    # R ⇌ I → D1, I → D2 ⇌ D3: first-step analysis from R: leaving I splits c : d
    s = Scheme()
    for k in ("a", "b", "c", "d"):
        s.add_parameter(k)
    s.add_edge("R", "I", "a")
    s.add_edge("I", "R", "b")
    s.add_edge("I", "D1", "c")
    s.add_edge("I", "D2", "d")
    s.add_edge("D2", "D3", "a")
    s.add_edge("D3", "D2", "a")
    m = compile_scheme(s, method="elimination")
    vals = {"a": 2.0, "b": 3.0, "c": 0.5, "d": 1.5}
    r = absorption_probabilities(m, vals, source="R")              # terminal components
    assert r["absorption"] == pytest.approx({"D1": 0.25, "D2+D3": 0.75}, rel=1e-15)
    r = absorption_probabilities(m, vals, source="R", targets=[["D1"], ["D2", "D3"]])
    assert r["absorption"] == pytest.approx({"D1": 0.25, "D2+D3": 0.75}, rel=1e-15)
    r = absorption_probabilities(m, vals, source="D3")              # already in one
    assert r["absorption"] == {"D1": 0.0, "D2+D3": 1.0}


def _model_with_input():
    s = Scheme(name="binder")
    for k in ("kon", "koff", "kc", "kr"):
        s.add_parameter(k)
    s.add_input("L")
    s.add_edge("E", "EL", "kon*L")
    s.add_edge("EL", "E", "koff")
    s.add_edge("EL", "P", "kc")
    s.add_edge("P", "EL", "kr")
    s.add_edge("E", "X", "kr")
    s.add_edge("X", "E", "koff")
    return s


def test_model_api_absorption_and_zero_concentration():
    m = compile_scheme(_model_with_input(), method="elimination")
    vals = {"kon": 4.0, "koff": 1.0, "kc": 2.0, "kr": 0.5, "L": 0.25}
    r = absorption_probabilities(m, vals, source="E", targets=["P", "X"])
    # first-step analysis (exact Fractions): from E: to EL w.p. kon L/(kon L + kr) = 2/3, to X 1/3;
    # from EL: P w.p. kc/(kc + koff) = 2/3, back to E 1/3 → h_P(E) = (2/3)(2/3)/(1 − (2/3)(1/3)) = 4/7
    assert r["absorption"]["P"] == pytest.approx(4 / 7, rel=1e-15)
    assert r["absorption"]["X"] == pytest.approx(3 / 7, rel=1e-15)
    assert r["never"] == 0.0
    # L = 0: E->EL is absent, P is never reached; X still is
    z = absorption_probabilities(m, dict(vals, L=0.0), source="E", targets=["P", "X"])
    assert z["absent_edges"] == ["E->EL"]
    assert z["absorption"] == {"P": 0.0, "X": 1.0}
    t = mean_first_passage(m, dict(vals, L=0.0), source="E", targets=["P"])
    assert t["mean_time"] is None and t["trapped_in"] == ["E", "X"]
    assert "E->EL" in t["absent_edges"]
    # with X as a second target the time is finite again: 1/kr
    t2 = mean_first_passage(m, dict(vals, L=0.0), source="E", targets=["P", "X"])
    assert t2["mean_time"] == pytest.approx(1 / 0.5, rel=1e-15)
    assert t2["absorption"] == {"P": 0.0, "X": 1.0}


def test_zero_rate_rows_batched_with_positive_rows():
    # two rows, one with the concentration at zero: solved per pattern of zero rates
    m = compile_scheme(_model_with_input(), method="elimination")
    vals = {"kon": 4.0, "koff": 1.0, "kc": 2.0, "kr": 0.5, "L": np.array([0.25, 0.0])}
    r = absorption_probabilities(m, vals, source="E", targets=["P", "X"])
    assert r["absorption"]["P"] == pytest.approx([4 / 7, 0.0], rel=1e-15)
    t = mean_first_passage(m, vals, source="E", targets=["P"])["mean_time"]
    assert t[0] is not None and t[1] is None


def test_negative_rate_refused_with_edge_names():
    edges = [(0, 1), (1, 0)]
    with pytest.raises(EvaluationError, match="0->1"):
        passage_times(2, edges, [-1.0, 1.0], source=0, targets=[1])
    with pytest.raises(EvaluationError, match="1->0"):
        absorption(2, edges, [1.0, float("nan")], source=0, groups=[[1]])
    with pytest.raises(EvaluationError, match="two target groups"):
        absorption(3, [(0, 1), (0, 2)], [1.0, 1.0], source=0, groups=[[1], [1, 2]])


MODEL = """
name = "binder"
[parameters]
kon = { value = 4.0 }
koff = { value = 1.0 }
kc = { value = 2.0 }
kr = { value = 0.5 }
[inputs]
L = { value = 0.25 }
[[edges]]
source = "E"
target = "EL"
rate = "kon*L"
[[edges]]
source = "EL"
target = "E"
rate = "koff"
[[edges]]
source = "EL"
target = "P"
rate = "kc"
[[edges]]
source = "P"
target = "EL"
rate = "kr"
[[edges]]
source = "E"
target = "X"
rate = "kr"
[[edges]]
source = "X"
target = "E"
rate = "koff"
"""


def test_cli_absorption_and_zero_concentration(tmp_path, capsys):
    f = tmp_path / "binder.toml"
    f.write_text(MODEL)
    assert main(["passage", str(f), "--from", "E", "--to", "P,X", "--json"]) == 0
    r = json.loads(capsys.readouterr().out)
    assert r["absorption"] == pytest.approx({"P": 4 / 7, "X": 3 / 7}, rel=1e-15)   # first-step analysis
    assert "model predictions" in r["note"]
    assert main(["passage", str(f), "--from", "E", "--to", "P", "--set", "L=0", "--json"]) == 0
    r = json.loads(capsys.readouterr().out)
    assert r["mean_time"] is None and r["trapped_in"] == ["E", "X"] and r["absent_edges"] == ["E->EL"]
    assert main(["passage", str(f), "--from", "E", "--to", "P", "--set", "L=0"]) == 0
    out = capsys.readouterr().out
    assert "infinite" in out and "E->EL" in out
    assert main(["passage", str(f), "--from", "E", "--to", "P,X"]) == 0
    out = capsys.readouterr().out
    assert "0.5714285714" in out and "0.4285714286" in out


def test_cli_thermo_zero_concentration_and_bound(tmp_path, capsys):
    f = tmp_path / "binder.toml"
    f.write_text(MODEL)
    assert main(["thermo", str(f), "--set", "L=0", "--json"]) == 0
    r = json.loads(capsys.readouterr().out)
    assert r["absent_edges"] == ["E->EL"]
    assert r["entropy_production_error"] is not None
    assert main(["thermo", str(f)]) == 0
    out = capsys.readouterr().out
    assert "±" in out and "model predictions" in out


def test_cli_negative_rate_refused(tmp_path, capsys):
    f = tmp_path / "neg.toml"
    f.write_text(MODEL.replace('rate = "kc"', 'rate = "kc - 3*kr - 1"'))
    for cmd in (["passage", str(f), "--from", "E", "--to", "P"], ["thermo", str(f)]):
        assert main(cmd) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and "EL->P" in err[0]
