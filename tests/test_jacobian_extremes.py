"""Jacobians at extreme rates: finite and accurate, or refused.

Reference: the exact derivative of the stationary distribution from exact
rational arithmetic (fractions.Fraction): A p = e_0 and
A ∂p/∂θ = −(∂L/∂θ) p, where A is the Laplacian with its first row replaced
by ones (the standard sensitivity equation of a finite Markov chain, common
practice). Labels are the symbols themselves, so ∂L/∂k_e has one column.

Goal (issue: every number right or refused): error ≤ 1e-12 of the natural
size p_i/θ_j (p_i for the log form) wherever that size is a normal double,
and the right sign wherever the true entry exceeds 1e-10 of it.
"""

import math
import random
from fractions import Fraction

import numpy as np
import pytest

from treeflux.compiler import Scheme, compile_scheme
from treeflux.runtime.errors import EvaluationError
from treeflux.runtime.sensitivity import jacobian_rows

from .schemes import exact_solve, independent_sites, random_strong_graph, rate_scheme

TINY = 2.2250738585072014e-308


def exact_jacobian(n, edges, rates):
    """(p, dp/dk_e) exactly: p[i], J[i][e] as Fractions."""
    ks = [Fraction(float(k)) for k in rates]
    A = [[Fraction(0)] * n for _ in range(n)]
    for (i, j), k in zip(edges, ks):
        A[j][i] += k
        A[i][i] -= k
    A[0] = [Fraction(1)] * n
    p = exact_solve(A, [Fraction(1)] + [Fraction(0)] * (n - 1))
    J = [[None] * len(edges) for _ in range(n)]
    for e, (i, j) in enumerate(edges):
        rhs = [Fraction(0)] * n
        rhs[j] -= p[i]
        rhs[i] += p[i]
        rhs[0] = Fraction(0)
        col = exact_solve(A, rhs)
        for s in range(n):
            J[s][e] = col[s]
    return p, J


def _check(model, n, edges, rates, *, log):
    idx = [model.symbols.index(f"k{e}") for e in range(len(edges))]
    X = np.zeros((1, len(model.symbols)))
    X[0, idx] = rates
    J = model.jacobian(X)[0]
    assert np.isfinite(J).all()
    p, Jx = exact_jacobian(n, edges, rates)
    worst = 0.0
    for a, name in enumerate(model.states):
        i = int(name[1:])
        for e, k in enumerate(rates):
            k = Fraction(float(k))
            true = Jx[i][e] * k if log else Jx[i][e]
            natural = p[i] if log else p[i] / k
            if float(natural) < TINY or float(p[i]) < TINY:
                continue
            got = Fraction(float(J[a, idx[e]]))
            err = float(abs(got - true) / natural)
            worst = max(worst, err)
            if abs(true) > natural / 10**10:
                assert (got > 0) == (true > 0), (name, e, float(got), float(true))
    assert worst <= 1e-12, worst
    return worst


@pytest.mark.parametrize("method", ["elimination", "trees"])
@pytest.mark.parametrize("log", [True, False])
@pytest.mark.parametrize("decades", [100, 12, 3])
def test_random_schemes_against_exact_fractions(method, log, decades):
    for seed in range(6):
        rng = random.Random(1000 * decades + seed)
        n = rng.randint(4, 9)
        edges = random_strong_graph(n, extra=rng.randint(1, 2 * n), rng=rng)
        s, _ = rate_scheme(n, edges)
        m = compile_scheme(s, method=method, backend="python", jacobian=True, log_jacobian=log)
        rates = [10 ** rng.uniform(-decades, decades) for _ in edges]
        _check(m, n, edges, rates, log=log)


def test_llvm_back_end_at_extreme_rates():
    rng = random.Random(7)
    n = 8
    edges = random_strong_graph(n, extra=10, rng=rng)
    s, _ = rate_scheme(n, edges)
    for log in (True, False):
        m = compile_scheme(s, method="elimination", backend="llvm", jacobian=True, log_jacobian=log)
        for _ in range(3):
            _check(m, n, edges, [10 ** rng.uniform(-100, 100) for _ in edges], log=log)


def test_equilibrium_method_product_form():
    # Independent two-state sites: p(bits) = Π_i (on_i or off_i)/(on_i + off_i)
    # (product form of independent sites, common practice), so
    # ∂ log p/∂ log on_i = [bit_i = 1] − on_i/(on_i + off_i), exactly.
    s = independent_sites(3)
    m = compile_scheme(s, method="equilibrium", backend="python", jacobian=True, log_jacobian=True)
    rng = random.Random(3)
    vals = {name: 10 ** rng.uniform(-100, 100) for name in m.symbols}
    J = m.jacobian(vals)[0]
    P = m.steady_state(vals)[0]
    for a, bits in enumerate(m.states):
        for i in range(3):
            on, off = Fraction(vals[f"on{i}"]), Fraction(vals[f"off{i}"])
            frac = on / (on + off)
            d_on = (1 if bits[i] == "1" else 0) - frac
            for name, true_log in ((f"on{i}", d_on), (f"off{i}", -d_on)):
                if P[a] < TINY:
                    continue
                got = J[a, m.symbols.index(name)]
                assert abs(Fraction(got) - Fraction(P[a]) * true_log) <= Fraction(1e-12) * Fraction(P[a])


def test_plain_derivative_at_zero_concentration():
    # E <-> ES <-> EP, binding k1*S: at S = 0 the log form carries nothing,
    # the plain derivative is the initial slope. Michaelis-Menten-like check:
    # with reverse-free product release p_ES = k1 S/(k1 S + k2) + ..., compared
    # with the exact derivative (edges with S as a factor).
    s = Scheme()
    s.add_parameter("k1", value=2.0)
    s.add_parameter("k2", value=3.0)
    s.add_parameter("k3", value=5.0)
    s.add_input("S", value=0.0)
    s.add_edge("E", "ES", "k1*S")
    s.add_edge("ES", "E", "k2")
    s.add_edge("ES", "EP", "k3")
    s.add_edge("EP", "E", "k2")
    m = compile_scheme(s, method="elimination", backend="python", jacobian=True)
    J = m.jacobian({"S": 0.0})[0]
    # At S = 0 everything sits in E; d p_ES/dS = k1/(k2 + k3), d p_EP/dS = k1 k3/((k2 + k3) k2)
    # (first-order expansion of the steady state in S, derived by hand).
    j = m.symbols.index("S")
    es, ep, e = (m.states.index(x) for x in ("ES", "EP", "E"))
    assert J[es, j] == pytest.approx(2 / 8, rel=1e-14)
    assert J[ep, j] == pytest.approx(2 * 5 / (8 * 3), rel=1e-14)
    assert J[e, j] == pytest.approx(-(2 / 8 + 10 / 24), rel=1e-14)
    assert np.all(J[:, :3] == 0)


def test_derivative_beyond_float_range_is_refused():
    s = Scheme()
    s.add_edge("A", "B", "k1")
    s.add_edge("B", "A", "k2")
    m = compile_scheme(s, method="elimination", backend="python", jacobian=True)
    # ∂p_A/∂k1 = −k2/(k1 + k2)²: about −1/(4·5e-320) = −5e318 at k1 = k2 = 5e-320.
    with pytest.raises(EvaluationError, match="exceeds the float64"):
        m.jacobian({"k1": 5e-320, "k2": 5e-320})
    # the log form of the same point is p-sized and fine
    m = compile_scheme(s, method="elimination", backend="python", jacobian=True, log_jacobian=True)
    J = m.jacobian({"k1": 5e-320, "k2": 5e-320})[0]
    order = [m.states.index("A"), m.states.index("B")]
    cols = [m.symbols.index("k1"), m.symbols.index("k2")]
    assert np.allclose(J[np.ix_(order, cols)], [[-0.25, 0.25], [0.25, -0.25]], rtol=1e-12, atol=0)


def test_safe_path_matches_exact_on_stiff_ring():
    # The multiprecision path alone, against exact fractions.
    n = 5
    edges = [(i, (i + 1) % n) for i in range(n)] + [((i + 1) % n, i) for i in range(n)]
    rng = random.Random(11)
    rates = [10 ** rng.uniform(-100, 100) for _ in edges]
    trees = [["sym", e] for e in range(len(edges))]
    D = jacobian_rows(n, edges, trees, np.array([rates]), log=True)[0]
    p, Jx = exact_jacobian(n, edges, rates)
    for i in range(n):
        for e, k in enumerate(rates):
            true = Jx[i][e] * Fraction(k)
            if float(p[i]) >= TINY:
                assert abs(Fraction(D[i, e]) - true) <= Fraction(1e-13) * p[i]


def test_observable_gradient_follows_the_same_guard():
    rng = random.Random(5)
    n = 6
    edges = random_strong_graph(n, extra=6, rng=rng)
    s, _ = rate_scheme(n, edges)
    s.add_observable("pair", {"s0": 1.0, "s1": 2.0})
    m = compile_scheme(s, method="trees", backend="python", jacobian=True, log_jacobian=True)
    rates = [10 ** rng.uniform(-100, 100) for _ in edges]
    idx = [m.symbols.index(f"k{e}") for e in range(len(edges))]
    X = np.zeros((1, len(m.symbols)))
    X[0, idx] = rates
    G = m.observable_jacobian(X)[0, 0]
    J = m.jacobian(X)[0]
    w = np.zeros(len(m.states))
    w[m.states.index("s0")], w[m.states.index("s1")] = 1.0, 2.0
    assert np.isfinite(G).all()
    scale = max(w @ m.steady_state(X)[0], TINY)
    assert np.max(np.abs(G - w @ J)) <= 1e-12 * scale
    assert math.isfinite(float(G.sum()))
