"""Every steady-state number right or refused at extreme rates.

Random schemes with rates log-uniform over [1e-100, 1e100], [1e-12, 1e12]
and [1e-3, 1e3], every method and back end, against mpmath (LU solve of the
generator with Σp = 1, precision raised until two solves agree to 1e-30).
Every entry whose true value is a normal double must carry a relative error
≤ 1e-14; entries below the normal range must not be reported as large.
"""

import random

import mpmath
import numpy as np
import pytest

from treeflux.compiler.pipeline import compile_scheme
from treeflux.runtime.numeric import EliminationPlan, exact_steady_state

from .schemes import hypercube_scheme, mp_steady_state, random_strong_graph, rate_scheme

TINY = np.finfo(np.float64).tiny


def reference(n, edges, rates):
    """mpmath at rising precision until two solves agree (tests/schemes.py)."""
    dps, prev = 60, None
    while True:
        try:
            cur = mp_steady_state(n, edges, rates, dps=dps, floats=False)
        except ZeroDivisionError:               # "numerically singular" at this precision
            dps *= 2
            continue
        if prev is not None and all(abs(a - b) <= mpmath.mpf(10) ** -30 * abs(a) for a, b in zip(cur, prev)):
            return np.array([float(v) for v in cur])
        prev, dps = cur, dps * 2


def assert_accurate(p, truth, what=""):
    normal = truth >= TINY
    err = np.abs(p[normal] - truth[normal]) / truth[normal]
    assert err.max(initial=0.0) <= 1e-14, f"{what}: relative error {err.max():.3g}"
    assert (p[~normal] < 2 * TINY).all(), f"{what}: an entry below the normal range reported large"


def random_case(seed, n, decades, dense=False):
    rng = np.random.default_rng(seed)
    extra = n * (n - 1) - n if dense else int(rng.integers(0, n))
    edges = random_strong_graph(n, extra=min(extra, n * (n - 1) - n), rng=random.Random(seed))
    rates = 10.0 ** rng.uniform(-decades, decades, size=len(edges))
    return edges, rates


# ------------------------------------------------------------------ looped numeric path

@pytest.mark.parametrize("decades", [100, 12, 3])
@pytest.mark.parametrize("n,dense", [(4, True), (8, False), (12, True), (20, False), (40, False), (100, False)])
def test_numeric_path_random(decades, n, dense):
    for seed in range(2):
        edges, rates = random_case(1000 * n + seed + decades, n, decades, dense)
        truth = reference(n, edges, rates)
        for backend in ("c", "numpy"):
            p = EliminationPlan(n, edges, backend=backend).steady_state(rates[None, :])[0]
            assert_accurate(p, truth, f"numeric/{backend} n={n} seed={seed}")


def test_numeric_path_regression_state_pushed_to_zero():
    # Before: back-substitution rescaled earlier x's by 2^-e and pushed one to
    # 0, after which states computed from it were 0 or wrong (seeds found by
    # search with rates log-uniform over [1e-100, 1e100]).
    for seed in (11, 20, 23, 28):
        rng = np.random.default_rng(seed)
        n = int(rng.integers(4, 41))
        edges = random_strong_graph(n, extra=int(rng.integers(0, 2 * n)), rng=random.Random(seed))
        rates = 10.0 ** rng.uniform(-100, 100, size=len(edges))
        truth = reference(n, edges, rates)
        for backend in ("c", "numpy"):
            p = EliminationPlan(n, edges, backend=backend).steady_state(rates[None, :])[0]
            assert_accurate(p, truth, f"seed {seed} {backend}")


def test_extended_range_recompute_agrees_with_mpmath():
    # The decimal path of last resort, on its own.
    edges, rates = random_case(7, 10, 100)
    assert_accurate(exact_steady_state(10, edges, rates), reference(10, edges, rates), "exact")


# ------------------------------------------------------------------ compiled models

def compiled(scheme, method, backend):
    return compile_scheme(scheme, method=method, backend=backend, cache=False)


def model_rows(m, order, edges, rates_rows):
    """Symbol rows for rate_scheme models: symbol k<e> is the rate of edge e."""
    col = {name: j for j, name in enumerate(m.symbols)}
    X = np.empty((len(rates_rows), len(m.symbols)))
    for e in range(len(edges)):
        X[:, col[f"k{e}"]] = rates_rows[:, e]
    return X


def check_model(m, order, n, edges, rates_rows, truths, what):
    X = model_rows(m, order, edges, rates_rows)
    P = m.steady_state(X)
    for r, truth in enumerate(truths):
        # scheme states are named s<i>; order[a] is the index of scheme state a
        p = np.empty(n)
        p[order] = P[r]
        assert_accurate(p, truth, f"{what} row {r}")
    return P


@pytest.mark.parametrize("method", ["trees", "elimination", "numeric"])
@pytest.mark.parametrize("backend", ["python", "llvm"])
def test_compiled_methods_random(method, backend):
    for n, dense in ((4, True), (6, False), (9, False)):
        if method == "trees" and n > 6:
            continue
        edges, _ = random_case(n, n, 3, dense)
        scheme, order = rate_scheme(n, edges)
        m = compiled(scheme, method, backend)
        rng = np.random.default_rng(n)
        rows = np.vstack([10.0 ** rng.uniform(-d, d, size=(2, len(edges))) for d in (100, 12, 3)])
        truths = [reference(n, edges, r) for r in rows]
        check_model(m, order, n, edges, rows, truths, f"{method}/{backend} n={n}")


@pytest.mark.parametrize("backend", ["c", "cython"])
def test_native_backends_small_scheme(backend):
    edges, _ = random_case(5, 5, 3, True)
    scheme, order = rate_scheme(5, edges)
    rng = np.random.default_rng(3)
    rows = np.vstack([10.0 ** rng.uniform(-d, d, size=(2, len(edges))) for d in (100, 12, 3)])
    truths = [reference(5, edges, r) for r in rows]
    for method in ("elimination", "trees"):
        m = compiled(scheme, method, backend)
        check_model(m, order, 5, edges, rows, truths, f"{method}/{backend}")


def test_elimination_underflow_regression():
    # Straight-line elimination underflowed an intermediate silently (p = 0
    # where the truth was ~1e-239) while the row sum stayed 1: now the
    # in-kernel guard sends such rows to the looped path.
    found = 0
    for seed in range(40):
        edges, rates = random_case(seed, 8, 100)
        truth = reference(8, edges, rates)
        if truth.min() > 1e-200:
            continue
        found += 1
        scheme, order = rate_scheme(8, edges)
        for backend in ("python", "llvm"):
            m = compiled(scheme, "elimination", backend)
            check_model(m, order, 8, edges, rates[None, :], [truth], f"seed {seed} {backend}")
        if found == 2:
            break
    assert found == 2


def test_trees_fallback_is_as_accurate_as_elimination():
    # auto picks trees on small schemes; rows beyond the tree range fall back
    # to the looped path, which must be as accurate as elimination.
    edges = [(0, 1), (1, 0), (1, 2), (2, 1), (2, 3), (3, 2), (3, 0), (0, 3)]
    scheme, order = rate_scheme(4, edges)
    rng = np.random.default_rng(5)
    rows = 10.0 ** rng.uniform(-100, 100, size=(6, len(edges)))
    truths = [reference(4, edges, r) for r in rows]
    for method in ("auto", "trees", "elimination", "equilibrium"):
        if method == "equilibrium":
            continue                            # needs detailed balance: see the balanced test below
        m = compiled(scheme, method, "llvm")
        check_model(m, order, 4, edges, rows, truths, method)


def test_equilibrium_extreme_rates():
    # A reversible ring whose rates obey detailed balance: Kolmogorov's
    # criterion (product of rates around the cycle equal both ways:
    # k0·k2·k4 = k1·k3·k(0->2)) holds identically with k(0->2) defined so.
    s = rate_scheme(3, [(0, 1), (1, 0), (1, 2), (2, 1), (2, 0)])[0]
    s.add_edge("s0", "s2", "k0*k2*k4/(k1*k3)")
    edges = [(0, 1), (1, 0), (1, 2), (2, 1), (2, 0), (0, 2)]
    m = compiled(s, "equilibrium", "llvm")
    rng = np.random.default_rng(9)
    K = 10.0 ** rng.uniform(-60, 60, size=(8, 5))
    P = m.steady_state({f"k{e}": K[:, e] for e in range(5)})
    for r in range(8):
        with mpmath.workdps(60):
            k = [mpmath.mpf(float(v)) for v in K[r]]
            rates = k + [k[0] * k[2] * k[4] / (k[1] * k[3])]
        truth = reference(3, edges, rates)
        p = np.empty(3)
        p[[int(x[1:]) for x in m.states]] = P[r]
        assert_accurate(p, truth, f"equilibrium row {r}")


def test_observables_and_basis_use_the_same_guard():
    # Before: observables() returned 0.0 where steady_state() gave 9.3e-177.
    edges, _ = random_case(8, 6, 3)
    scheme, order = rate_scheme(6, edges)
    scheme.add_observable("every", {name: 1.0 + k for k, name in enumerate(scheme.states)})
    m = compiled(scheme, "elimination", "llvm")
    rng = np.random.default_rng(2)
    rows = 10.0 ** rng.uniform(-100, 100, size=(6, len(edges)))
    X = model_rows(m, order, edges, rows)
    P = m.steady_state(X)
    O = m.observables(X)
    np.testing.assert_allclose(O, P @ m.observable_weights, rtol=1e-14)
    B = m.basis(X)
    np.testing.assert_array_equal(B[:, 0, :], P)
    for r in range(len(rows)):
        p = np.empty(6)
        p[order] = P[r]
        assert_accurate(p, reference(6, edges, rows[r]), f"row {r}")


def test_zero_concentration_alike_everywhere():
    # A zero input removes the edges it multiplies in steady_state,
    # observables and basis alike (closed form: with c = 0 the scheme is the
    # two-state chain A <-> B, p_A = kb / (ka + kb)).
    from treeflux.compiler import Scheme

    s = Scheme(name="zero")
    for k in ("ka", "kb", "kc", "kd", "ke"):
        s.add_parameter(k)
    s.add_edge("A", "B", "ka")
    s.add_edge("B", "A", "kb")
    s.add_edge("B", "C", "kc*c")
    s.add_edge("C", "B", "kd")
    s.add_edge("C", "A", "ke")
    s.add_input("c")
    s.add_observable("occ", {"A": 1.0})
    for method in ("elimination", "trees"):
        m = compiled(s, method, "llvm")
        X = {"ka": 2.0, "kb": 3.0, "kc": 5.0, "kd": 7.0, "ke": 11.0, "c": np.array([0.0, 1.0])}
        P = m.steady_state(X)
        assert P[0, m.states.index("A")] == pytest.approx(3 / 5, rel=1e-15)
        assert P[0, m.states.index("C")] == 0.0
        assert m.observables(X)[0, 0] == pytest.approx(3 / 5, rel=1e-15)
        np.testing.assert_array_equal(m.basis(X)[:, 0, :], P)
