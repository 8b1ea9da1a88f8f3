"""Large graphs: elimination without enumeration, method="auto", refusals."""

import random
from pathlib import Path

import numpy as np
import pytest
import sympy

from treeflux.compiler import ModelError, Scheme, TooLargeError, compile_scheme, load
from treeflux.compiler.pipeline import formula, plan
from treeflux.compiler.structure import tree_counts

from .schemes import hypercube, independent_sites, mp_steady_state, random_strong_graph, rate_scheme

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"


SMALL_EXAMPLES = [p for p in sorted(EXAMPLES.glob("*.toml")) if len(load(p).states) <= 8]


def test_examples_cover_small_and_large():
    assert len(SMALL_EXAMPLES) >= 4
    big = load(EXAMPLES / "promoter_three_activators.toml")
    # The 4-cube: OEIS A091664 gives 42,467,328 spanning trees.
    assert tree_counts(len(big.states), big.edge_list()) == [42_467_328] * 16
    m = compile_scheme(big)
    assert m.method == "elimination"
    x = m.as_array({})
    ref = mp_steady_state(16, big.edge_list(), m.labels(x)[0])
    np.testing.assert_allclose(m.steady_state(x)[0], ref, rtol=1e-13)


@pytest.mark.parametrize("path", SMALL_EXAMPLES, ids=lambda p: p.stem)
def test_elimination_equals_tree_sum_symbolically(path):
    # The Matrix-Tree theorem (Tutte 1948) says ρ_i is the tree sum; the nested
    # elimination form x_i·Π d_k must be the same rational function exactly.
    # Up to 5 states SymPy cancels the difference to 0; for every example both
    # closed forms are also evaluated exactly at random rational points: two
    # different rational functions of total degree d agree at a random point
    # of a set of size S with probability at most d/S (Schwartz, J. ACM 27
    # (1980) 701; Zippel 1979), here below 1e-7 per point.
    s = load(path)
    rng = random.Random(len(s.states))
    syms = {name: sympy.Symbol(name, positive=True) for name in s.symbols}
    points = [{syms[k]: sympy.Rational(rng.randint(1, 10**9), rng.randint(1, 10**9)) for k in syms}
              for _ in range(3)]
    for state in s.states:
        nested = formula(s, state, method="elimination")
        trees = formula(s, state, method="trees")
        if len(s.states) <= 5:
            assert sympy.cancel(sympy.together(nested - trees)) == 0, state
        for point in points:
            assert nested.xreplace(point) == trees.xreplace(point), state


def test_hypercube_counts():
    # OEIS A091664: Q4 has 42,467,328 spanning trees; Q6 has
    # 2^(2^6-6-1) * Π k^C(6,k) (the Laplacian spectrum of Q_d; common practice).
    n, edges = hypercube(4)
    assert tree_counts(n, edges) == [42_467_328] * n
    n, edges = hypercube(6)
    expect = 2 ** (64 - 6 - 1) * 2 ** 15 * 3 ** 20 * 4 ** 15 * 5 ** 6 * 6
    assert tree_counts(n, edges) == [expect] * n


@pytest.mark.parametrize("k", [4, 6])
def test_product_form_hypercubes(k):
    # Independent two-state sites: product-form stationary distribution
    # (common practice). Q4 goes through straight-line elimination, Q6 through
    # whatever auto picks.
    s = independent_sites(k)
    m = compile_scheme(s, method="auto")
    rng = np.random.default_rng(k)
    X = 10 ** rng.uniform(-6, 6, size=(20, 2 * k))
    P = m.steady_state(X)
    for a, state in enumerate(m.states):
        expect = np.ones(len(X))
        for site, bit in enumerate(state):
            on, off = X[:, 2 * site], X[:, 2 * site + 1]
            expect *= on / (on + off) if bit == "1" else off / (on + off)
        np.testing.assert_allclose(P[:, a], expect, rtol=1e-12)


@pytest.mark.parametrize("n, method", [(12, "elimination"), (16, "elimination"), (50, "auto"),
                                       (16, "numeric"), (50, "numeric")])
def test_stiff_random_graphs_against_mpmath(n, method):
    # Reference: mpmath at 50 digits. Rates log-uniform over [1e-8, 1e8]. The
    # tolerance holds because subtraction-free elimination is entrywise
    # relatively accurate whatever the conditioning (O'Cinneide, Numer. Math.
    # 65 (1993) 109–120): the error bound grows with n, not with the rates.
    rng = random.Random(n)
    edges = random_strong_graph(n, extra=2 * n, rng=rng)
    s, order = rate_scheme(n, edges)
    m = compile_scheme(s, method=method)
    X = 10 ** np.random.default_rng(n).uniform(-8, 8, size=(3, len(edges)))
    P = m.steady_state(X)
    for row in range(len(X)):
        ref = mp_steady_state(n, edges, X[row])
        for a, st in enumerate(order):
            assert abs(P[row, a] - ref[st]) <= 1e-12 * ref[st]


def test_auto_choices():
    assert plan(independent_sites(3)).method == "equilibrium"  # detailed balance holds
    n, edges = hypercube(4)
    s, _ = rate_scheme(n, edges)
    p = plan(s)
    assert p.method == "elimination" and p.reasons["elimination_flops"] < 2000
    assert p.reasons["tree_factors"] == 16 * 42_467_328 * 15
    n, edges = hypercube(7)
    s, _ = rate_scheme(n, edges)
    assert plan(s).method == "numeric"


def test_refusals_before_work():
    n, edges = hypercube(4)
    s, _ = rate_scheme(n, edges)
    with pytest.raises(TooLargeError, match=r"tree enumeration needs 10,192,158,720 tree factors.*elimination"):
        compile_scheme(s, method="trees")
    with pytest.raises(TooLargeError, match="expanded formula"):
        formula(s, s.states[0], expand=True)
    with pytest.raises(ModelError, match="needs detailed balance"):
        compile_scheme(s, method="equilibrium")


def test_several_terminal_components_on_every_path():
    s = Scheme()
    s.add_edge("A", "B", "a")
    s.add_edge("A", "C", "b")
    with pytest.raises(ModelError, match="needs one terminal component"):
        compile_scheme(s, method="numeric")
    for method in ("trees", "elimination", "auto"):
        m = compile_scheme(s, method=method)
        with pytest.raises(Exception, match="2 terminal components"):
            m.steady_state(np.ones((1, 2)))
        np.testing.assert_allclose(m.basis(np.ones((1, 2)))[0], [[0, 1, 0], [0, 0, 1]])


def test_lattice_numeric_path_against_scipy():
    # scipy.sparse.linalg.spsolve as the reference on moderate rates (its
    # accuracy is fine there); a 20x20 lattice with independent rates.
    from scipy.sparse import csc_matrix
    from scipy.sparse.linalg import spsolve

    side = 20
    s = Scheme()
    edges = []
    for r in range(side):
        for c in range(side):
            for dr, dc in ((0, 1), (1, 0), (0, -1), (-1, 0)):
                rr, cc = r + dr, c + dc
                if 0 <= rr < side and 0 <= cc < side:
                    s.add_edge(f"{r}_{c}", f"{rr}_{cc}", f"k{len(edges)}")
                    edges.append((r * side + c, rr * side + cc))
    m = compile_scheme(s, method="numeric")
    rates = 10 ** np.random.default_rng(0).uniform(-1, 1, size=len(edges))
    P = m.steady_state(rates[None, :])[0]
    n = side * side
    idx = {name: i for i, name in enumerate(s.states)}
    rows, cols, vals = [], [], []
    for (i, j), k in zip(edges, rates):
        rows += [j, i]
        cols += [i, i]
        vals += [k, -k]
    L = csc_matrix((vals, (rows, cols)), shape=(n, n)).tolil()
    L[0, :] = 1.0
    b = np.zeros(n)
    b[0] = 1
    ref = spsolve(L.tocsc(), b)
    ours = np.array([P[idx[f"{i // side}_{i % side}"]] for i in range(n)])
    np.testing.assert_allclose(ours, ref, rtol=1e-9)


def test_formula_of_a_large_scheme_is_refused_with_the_estimate():
    side = 30
    s = Scheme()
    for r in range(side):
        for c in range(side):
            if c + 1 < side:
                s.add_edge(f"{r}_{c}", f"{r}_{c + 1}", "a")
                s.add_edge(f"{r}_{c + 1}", f"{r}_{c}", "b")
            if r + 1 < side:
                s.add_edge(f"{r}_{c}", f"{r + 1}_{c}", "a")
                s.add_edge(f"{r + 1}_{c}", f"{r}_{c}", "b")
    with pytest.raises(TooLargeError, match=r"nested closed form needs about [\d,]+ operations"):
        formula(s, "0_0")
    # Elimination would need about 311,000 flops, but the labels balance
    # (a uniform drift), so auto takes the O(n) path products instead.
    assert plan(s).method == "equilibrium"


def drifting_lattice(side, right="k*b", left="k/b", up="k", down="k", odd_right=None):
    s = Scheme()
    for r in range(side):
        for c in range(side):
            if c + 1 < side:
                s.add_edge(f"{r}_{c}", f"{r}_{c + 1}", odd_right if odd_right and r % 2 else right)
                s.add_edge(f"{r}_{c + 1}", f"{r}_{c}", left)
            if r + 1 < side:
                s.add_edge(f"{r}_{c}", f"{r + 1}_{c}", down)
                s.add_edge(f"{r + 1}_{c}", f"{r}_{c}", up)
    return s


def test_large_equilibrium_scheme_found_by_random_point_test():
    # 841 basis cycles: beyond the symbolic test, so detailed balance is
    # decided exactly at random rational points (Schwartz–Zippel). With right
    # rate k·b and left rate k/b the stationary law is p(r, c) ∝ b^(2c)
    # (detailed balance along rows, uniform along columns; common practice).
    side = 30
    s = drifting_lattice(side)
    p = plan(s)
    assert p.reasons["detailed_balance"] is True and p.method == "equilibrium"
    m = compile_scheme(s)
    b = 1.3
    P = m.steady_state({"k": 2.0, "b": b})[0]
    weights = b ** (2 * np.arange(side))
    idx = {name: i for i, name in enumerate(m.states)}
    for r in (0, 17):
        for c in (0, 5, 29):
            expect = weights[c] / (side * weights.sum())
            assert abs(P[idx[f"{r}_{c}"]] - expect) <= 1e-13 * expect
    # A uniform drift is still balanced on a lattice; a drift that differs
    # between rows drives a current around every square.
    driven = drifting_lattice(side, odd_right="k*e")
    from treeflux.compiler.structure import balanced_at_random_points
    assert balanced_at_random_points(driven) == "conditional"
    assert plan(driven).method == "numeric"
