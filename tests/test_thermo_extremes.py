"""Thermodynamics near and far from detailed balance: entropy production
never negative, accurate to its stated bound against 50-digit mpmath, equal
fluxes around a single cycle, consistent verdicts with zero concentrations.

Reference values: mpmath at 50 digits (steady state by LU solve of the
master equation, tests/schemes.mp_steady_state), σ = ½ Σ J ln(p_i ℓ_ij /
p_j ℓ_ji) (Schnakenberg, Rev. Mod. Phys. 48 (1976) 571) evaluated at the
same precision on the same float rates.
"""

import math
import random

import mpmath
import numpy as np
import pytest

from treeflux.compiler import Scheme, compile_scheme
from treeflux.runtime.analysis import thermodynamics
from treeflux.runtime.errors import EvaluationError
from treeflux.runtime.thermo import exact_steady_state

from .schemes import mp_steady_state, random_strong_graph


def numbered(n, edges):
    s = Scheme()
    for e in range(len(edges)):
        s.add_parameter(f"k{e}")
    for e, (i, j) in enumerate(edges):
        s.add_edge(f"X{i}", f"X{j}", f"k{e}")
    return s


def _model(n, edges, method="elimination"):
    return compile_scheme(numbered(n, edges), method=method)


def _run(m, rates, **kw):
    return thermodynamics(m, dict(zip(m.symbols, [float(r) for r in rates])), **kw)


def mp_sigma(n, edges, rates, dps=50):
    """σ and the net flux per pair at ``dps`` digits (mpmath), for the float rates."""
    with mpmath.workdps(dps):
        p = mp_steady_state(n, edges, rates, dps=dps, floats=False)
        k = {e: mpmath.mpf(float(r)) for e, r in zip(edges, rates)}
        sigma, flux = mpmath.mpf(0), {}
        for (i, j) in edges:
            if (j, i) in k and i < j:
                a, b = p[i] * k[(i, j)], p[j] * k[(j, i)]
                flux[(i, j)] = a - b
                if a != b:
                    sigma += (a - b) * mpmath.log(a / b)
        return sigma, flux


def balanced_rates(n, edges, lo, hi, rng):
    """ℓ(i→j) = b_ij w_j, ℓ(j→i) = b_ij w_i: Kolmogorov's criterion holds on
    every cycle; the rates stay within [lo, hi] (log-uniform choices)."""
    span = math.log10(hi) - math.log10(lo)
    w = 10 ** rng.uniform(-span / 4, span / 4, n)
    b = {}
    rates = []
    for (i, j) in edges:
        key = (min(i, j), max(i, j))
        if key not in b:
            b[key] = 10 ** rng.uniform(math.log10(lo) + span / 4, math.log10(hi) - span / 4)
        rates.append(b[key] * w[j])
    return np.array(rates)


def ring_edges(n):
    return [e for i in range(n) for e in ((i, (i + 1) % n), ((i + 1) % n, i))]


def reversible_graph(n, extra, seed):
    rnd = random.Random(seed)
    und = {tuple(sorted(e)) for e in random_strong_graph(n, extra=extra, rng=rnd)}
    return [e for a, b in sorted(und) for e in ((a, b), (b, a))]


# ------------------------------------------------------------------ near balance

@pytest.mark.parametrize("eps_exp", [2, 4, 6, 8, 10, 12, 14])
@pytest.mark.parametrize("seed", [0, 1])
def test_near_balance_ring_sigma_within_bound(eps_exp, seed):
    n = 6
    edges = ring_edges(n)
    rng = np.random.default_rng(seed)
    rates = balanced_rates(n, edges, 1e-3, 1e3, rng)
    rates[0] *= 1 + 10.0 ** -eps_exp                # drive one transition off balance
    m = _model(n, edges)
    r = _run(m, rates)
    ref, ref_flux = mp_sigma(n, edges, rates)
    sigma, bound = r["entropy_production"], r["entropy_production_error"]
    assert sigma >= 0
    assert bound is not None and bound <= 1e-13 * float(ref)
    assert abs(sigma - float(ref)) <= bound + 1e-300
    # one cycle: every pair carries the same net flux, bit for bit
    F = r["fluxes"]
    Jring = [F[f"X{i}->X{(i + 1) % n}"] if f"X{i}->X{(i + 1) % n}" in F else -F[f"X{(i + 1) % n}->X{i}"]
             for i in range(n)]
    assert len(set(Jring)) == 1
    assert Jring[0] == pytest.approx(float(ref_flux[(0, 1)]), rel=1e-15)
    # the cycle decomposition gives the same σ to the stated bounds (Schnakenberg 1976, §V)
    sc = r["entropy_production_cycles"]
    assert abs(sc - sigma) <= bound + r["entropy_production_cycles_error"]


def test_stiff_rates_one_percent_off_balance():
    # rates over [1e-12, 1e12] on a random reversible graph with cycles, one rate ×1.01
    for seed in range(3):
        n = 9
        edges = reversible_graph(n, 7, seed)
        rng = np.random.default_rng(100 + seed)
        rates = balanced_rates(n, edges, 1e-12, 1e12, rng)
        assert rates.min() >= 1e-12 and rates.max() <= 1e12
        rates[len(edges) // 2] *= 1.01
        m = _model(n, edges)
        r = _run(m, rates)
        ref, _ = mp_sigma(n, edges, rates)
        assert r["entropy_production"] > 0
        assert r["entropy_production"] == pytest.approx(float(ref), rel=1e-10)
        assert abs(r["entropy_production"] - float(ref)) <= r["entropy_production_error"]
        assert abs(r["entropy_production_cycles"] - r["entropy_production"]) <= (
            r["entropy_production_error"] + r["entropy_production_cycles_error"])


@pytest.mark.parametrize("method", ["elimination", "trees", "numeric"])
def test_exact_balance_gives_exact_zero(method):
    # rates that satisfy Kolmogorov's criterion exactly in floating point (powers of two)
    n = 5
    edges = ring_edges(n) + [(0, 2), (2, 0)]
    rnd = random.Random(4)
    w = [2.0 ** rnd.randint(-30, 30) for _ in range(n)]
    b = {}
    rates = []
    for (i, j) in edges:
        b.setdefault((min(i, j), max(i, j)), 2.0 ** rnd.randint(-20, 20))
        rates.append(b[(min(i, j), max(i, j))] * w[j])
    r = _run(_model(n, edges, method), rates)
    assert r["entropy_production"] == 0.0 and r["entropy_production_error"] == 0.0
    assert all(v == 0.0 for v in r["fluxes"].values())
    assert r["detailed_balance"]["holds"] is True


def test_identical_balance_is_zero_despite_rounded_rates():
    # ℓ(i→j) = b w_j, ℓ(j→i) = b w_i as expressions: balanced for every value
    # (Kolmogorov 1936); the products of rounded rates differ in the last bit.
    edges = [(0, 1), (1, 2), (2, 3), (3, 0), (0, 2)]
    s = Scheme()
    for i in range(4):
        s.add_parameter(f"w{i}")
    for e in range(len(edges)):
        s.add_parameter(f"b{e}")
    for e, (i, j) in enumerate(edges):
        s.add_edge(f"X{i}", f"X{j}", f"b{e}*w{j}")
        s.add_edge(f"X{j}", f"X{i}", f"b{e}*w{i}")
    rng = np.random.default_rng(7)
    vals = {k: float(v) for k, v in zip(s.symbols, 10 ** rng.uniform(-6, 6, len(s.symbols)))}
    m = compile_scheme(s)                                   # auto: equilibrium
    r = thermodynamics(m, vals)
    assert r["entropy_production"] == 0.0
    assert all(v == 0.0 for v in r["fluxes"].values())
    assert r["detailed_balance"]["holds"] is True
    # the same scheme through elimination, told the structural verdict
    r2 = thermodynamics(compile_scheme(s, method="elimination"), vals, balanced=True)
    assert r2["entropy_production"] == 0.0
    # not told: σ is the tiny true value for the rounded rates, ≥ 0, within its bound of mpmath
    r3 = thermodynamics(compile_scheme(s, method="elimination"), vals)
    assert r3["entropy_production"] >= 0.0
    assert r3["detailed_balance"]["holds"] is True


def test_exact_steady_state_against_mpmath():
    rnd = random.Random(11)
    n = 12
    edges = random_strong_graph(n, extra=10, rng=rnd)
    rates = [10.0 ** rnd.uniform(-20, 20) for _ in edges]
    p = exact_steady_state(n, edges, rates)
    ref = mp_steady_state(n, edges, rates, dps=60, floats=False)   # mpmath, 60 digits
    assert sum(p) == 1
    for a, b in zip(p, ref):
        assert float(a) == pytest.approx(float(b), rel=1e-15)


# ------------------------------------------------------------------ zero concentrations

def _ring_with_input():
    s = Scheme()
    for name in ("a", "b", "c", "d"):
        s.add_parameter(name)
    s.add_input("L")
    s.add_edge("E", "EL", "a*L")
    s.add_edge("EL", "E", "b")
    s.add_edge("EL", "P", "c")
    s.add_edge("P", "EL", "d")
    s.add_edge("P", "E", "c")
    s.add_edge("E", "P", "d")
    return s


def test_zero_concentration_infinite_affinity_sign_and_flux():
    m = compile_scheme(_ring_with_input(), method="elimination")
    vals = {"a": 2.0, "b": 1.0, "c": 5.0, "d": 0.5, "L": 0.0}
    r = thermodynamics(m, vals)
    assert r["absent_edges"] == ["E->EL"]
    assert r["one_way_edges"] == ["EL->E"]
    (cyc,) = r["affinities"]
    assert cyc["affinity"] is None
    # which direction is missing decides the sign; the note names the absent edge
    order = cyc["states"] + cyc["states"][:1]
    forward = [f"{u}->{v}" for u, v in zip(order, order[1:])]
    if "E->EL" in forward:
        assert cyc["affinity_limit"] == "-inf" and "E->EL" in cyc["note"]
    else:
        assert cyc["affinity_limit"] == "+inf" and "E->EL" in cyc["note"]
    # on a single cycle the flux runs the way the infinite affinity points
    assert (cyc["cycle_flux"] > 0) == (cyc["affinity_limit"] == "+inf")
    assert cyc["cycle_flux"] != 0
    # EL->E now carries flux with no way back: σ is infinite, and says which edge
    assert r["fluxes"]["E->EL"] < 0
    assert r["entropy_production"] is None and "EL->E" in r["entropy_production_note"]
    db = r["detailed_balance"]
    assert db["max_abs_affinity"] is None
    assert db["holds"] is False and "EL->E" in db["reason"]


def test_drained_state_carries_no_flux():
    # E ⇌ EL ⇌ P ⇌ E with L = 0 and no way into EL but binding: EL is empty,
    # the one-way EL->E carries nothing, σ stays finite (= the E⇌P pair's 0)
    s = Scheme()
    for name in ("a", "b", "c"):
        s.add_parameter(name)
    s.add_input("L")
    s.add_edge("E", "EL", "a*L")
    s.add_edge("EL", "E", "b")
    s.add_edge("EL", "P", "c*L")
    s.add_edge("P", "E", "c")
    s.add_edge("E", "P", "a")
    m = compile_scheme(s, method="elimination")
    r = thermodynamics(m, {"a": 2.0, "b": 1.0, "c": 5.0, "L": 0.0})
    assert r["probabilities"]["EL"] == 0.0
    assert r["fluxes"]["E->EL"] == 0.0 and r["fluxes"]["EL->P"] == 0.0
    assert r["entropy_production"] == 0.0
    assert r["one_way_edges"] == ["EL->E"]


def test_one_way_flux_direction_matches_sign():
    # a ring where one backward rate is zero at these values: flux runs forward, A = +inf
    s = Scheme()
    for k in ("f", "g"):
        s.add_parameter(k)
    s.add_input("c")
    names = ["A", "B", "C"]
    for i in range(3):
        s.add_edge(names[i], names[(i + 1) % 3], "f")
        s.add_edge(names[(i + 1) % 3], names[i], "g*c" if i == 0 else "g")
    m = compile_scheme(s, method="elimination")
    r = thermodynamics(m, {"f": 2.0, "g": 1.0, "c": 0.0})
    (cyc,) = r["affinities"]
    fwd = cyc["states"] + cyc["states"][:1]
    runs_forward = "A->B" in [f"{u}->{v}" for u, v in zip(fwd, fwd[1:])]
    assert cyc["affinity_limit"] == ("+inf" if runs_forward else "-inf")
    assert cyc["note"].count("B->A") == 1
    assert r["one_way_edges"] == ["A->B"]
    assert r["fluxes"]["A->B"] > 0
    assert r["entropy_production"] is None and "A->B" in r["entropy_production_note"]
    assert r["detailed_balance"]["holds"] is False
    assert r["detailed_balance"]["max_abs_affinity"] is None


def test_verdict_never_contradicts_itself():
    rng = np.random.default_rng(5)
    for _ in range(5):
        n = 5
        edges = ring_edges(n) + [(0, 2), (2, 0)]
        rates = 10 ** rng.uniform(-2, 2, len(edges))
        r = _run(_model(n, edges), rates)
        db = r["detailed_balance"]
        if "non-zero" in db["reason"]:
            assert db["holds"] is False and db["max_abs_affinity"] > 0
        assert (r["entropy_production"] > 0) == (not db["holds"])


def test_several_terminal_components_at_zero_concentration_refused():
    s = Scheme()
    s.add_parameter("k")
    s.add_input("c")
    s.add_edge("A", "B", "k*c")
    s.add_edge("B", "A", "k")
    s.add_edge("A", "C", "k*c")
    s.add_edge("C", "A", "k")
    s.add_edge("B", "D", "k")
    s.add_edge("D", "B", "k*c")
    m = compile_scheme(s, method="elimination")
    with pytest.raises(EvaluationError, match=r"zero rate on .*D->B"):
        thermodynamics(m, {"k": 1.0, "c": 0.0})


@pytest.mark.parametrize("seed", range(8))
def test_stiff_ring_one_rate_off_balance(seed):
    # a ring with rates log-uniform over [1e-12, 1e12], balanced through its
    # last reverse rate, then one rate ×1.01: σ to 1e-10 of mpmath (50 digits)
    rng = np.random.default_rng(seed)
    n = int(rng.integers(4, 8))
    edges = ring_edges(n)
    while True:
        rates = 10 ** rng.uniform(-12, 12, len(edges))
        lb = sum(math.log10(rates[2 * i]) for i in range(n)) - sum(math.log10(rates[2 * i + 1])
                                                                   for i in range(n - 1))
        if -12 <= lb <= 12:
            rates[2 * n - 1] = 10 ** lb
            break
    rates[int(rng.integers(len(edges)))] *= 1.01
    m = _model(n, edges, "trees" if seed % 2 else "elimination")
    r = _run(m, rates)
    ref, _ = mp_sigma(n, edges, rates)
    assert r["entropy_production"] > 0
    assert r["entropy_production"] == pytest.approx(float(ref), rel=1e-10)
    assert abs(r["entropy_production"] - float(ref)) <= r["entropy_production_error"]


def test_too_large_for_exact_path_says_so(monkeypatch):
    # beyond the work limit the float steady state is used and no bound is claimed
    import treeflux.runtime.thermo as th
    monkeypatch.setattr(th, "EXACT_WORK_LIMIT", 0)
    n = 5
    edges = ring_edges(n)
    rates = balanced_rates(n, edges, 1e-3, 1e3, np.random.default_rng(2))
    rates[0] *= 1.5
    r = _run(_model(n, edges), rates)
    ref, _ = mp_sigma(n, edges, rates)
    assert r["exact_fluxes"] is False and r["entropy_production_error"] is None
    assert "no error bound" in r["error_note"]
    assert r["entropy_production"] == pytest.approx(float(ref), rel=1e-10)   # far from balance: fine
