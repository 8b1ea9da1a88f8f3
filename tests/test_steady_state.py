"""The main job end to end (scheme → front end → IR → python back end → runtime),
checked against references from outside the project."""

import random

import numpy as np
import pytest

from treeflux.compiler import Scheme, compile_scheme
from treeflux.compiler.frontend.trees import rooted_trees
from treeflux.runtime.errors import EvaluationError

from .schemes import hypercube, independent_sites, mp_steady_state, random_strong_graph, rate_scheme


def briggs_haldane():
    s = Scheme()
    s.add_parameter("k1")
    s.add_parameter("km1")
    s.add_parameter("k2")
    s.add_input("S")
    s.add_edge("E", "ES", "k1*S")
    s.add_edge("ES", "E", "km1 + k2")  # unbinding, or catalysis releasing free enzyme
    return s


@pytest.mark.parametrize("method", ["trees", "elimination", "auto"])
def test_briggs_haldane(method):
    # Briggs & Haldane, Biochem. J. 19 (1925) 338: fraction of enzyme in ES is
    # S/(S+K_M) with K_M = (k_-1 + k_2)/k_1.
    m = compile_scheme(briggs_haldane(), method=method)
    rng = np.random.default_rng(1)
    X = 10 ** rng.uniform(-3, 3, size=(200, 4))
    P = m.steady_state(X)
    k1, km1, k2, S = X.T
    KM = (km1 + k2) / k1
    np.testing.assert_allclose(P[:, 1], S / (S + KM), rtol=1e-13)
    np.testing.assert_allclose(P.sum(axis=1), 1.0, rtol=1e-14)


@pytest.mark.parametrize("n", range(2, 7))
def test_cayley_trees(n):
    # Cayley's formula (Cayley, Q. J. Math. 23 (1889) 376): K_n has n^(n-2)
    # spanning trees; each orients uniquely toward any chosen root.
    edges = [(i, j) for i in range(n) for j in range(n) if i != j]
    for r in range(n):
        assert sum(1 for _ in rooted_trees(n, edges, r)) == n ** (n - 2)


def test_hypercube_tree_enumeration():
    # OEIS A091664: spanning trees of the d-cube, 384 for Q3; a rooted count
    # equals the undirected count for a symmetric digraph.
    n, edges = hypercube(3)
    assert [sum(1 for _ in rooted_trees(n, edges, r)) for r in range(n)] == [384] * n


def test_tree_enumeration_against_networkx():
    # networkx.number_of_spanning_trees counts arborescences directed away
    # from the root (float determinant, exact enough for these sizes); our
    # trees point toward the root, so compare on the reversed graph.
    import networkx as nx
    rng = random.Random(7)
    for trial in range(20):
        n = rng.randint(3, 6)
        edges = random_strong_graph(n, extra=rng.randint(0, n * 2), rng=rng)
        G = nx.DiGraph()
        G.add_nodes_from(range(n))
        G.add_edges_from((j, i) for i, j in edges)
        for r in range(n):
            ours = sum(1 for _ in rooted_trees(n, edges, r))
            theirs = round(nx.number_of_spanning_trees(G, root=r))
            assert ours == theirs


@pytest.mark.parametrize("method", ["trees", "elimination"])
def test_random_graphs_against_mpmath(method):
    # mpmath 50-digit solve of the Laplacian as the reference; rates
    # log-uniform over [1e-6, 1e6]; entrywise relative error <= 1e-12.
    rng = random.Random(3)
    nrng = np.random.default_rng(3)
    for trial in range(6):
        n = rng.randint(3, 6)
        edges = random_strong_graph(n, extra=n, rng=rng)
        s, order = rate_scheme(n, edges)
        m = compile_scheme(s, method=method)
        X = 10 ** nrng.uniform(-6, 6, size=(5, len(edges)))
        P = m.steady_state(X)
        for row in range(X.shape[0]):
            ref = mp_steady_state(n, edges, X[row])
            ours = P[row]
            for a, state in enumerate(order):
                assert abs(ours[a] - ref[state]) <= 1e-12 * ref[state]


def test_product_form_independent_sites():
    # Common practice: independent two-state sites give a product-form
    # stationary distribution, p(config) = Π_i (on_i/(on_i+off_i) or off_i/(on_i+off_i)).
    s = independent_sites(3)
    m = compile_scheme(s, method="elimination")
    rng = np.random.default_rng(5)
    X = 10 ** rng.uniform(-4, 4, size=(50, 6))
    P = m.steady_state(X)
    for a, state in enumerate(m.states):
        expect = np.ones(len(X))
        for site, bit in enumerate(state):
            on, off = X[:, 2 * site], X[:, 2 * site + 1]
            expect *= on / (on + off) if bit == "1" else off / (on + off)
        np.testing.assert_allclose(P[:, a], expect, rtol=1e-13)


def test_trees_and_elimination_agree_on_hypercube():
    n, edges = hypercube(3)
    s, _ = rate_scheme(n, edges)
    rng = np.random.default_rng(11)
    X = 10 ** rng.uniform(-3, 3, size=(100, len(edges)))
    a = compile_scheme(s, method="trees").steady_state(X)
    b = compile_scheme(s, method="elimination").steady_state(X)
    np.testing.assert_allclose(a, b, rtol=1e-12)


def test_extreme_rates_stay_finite():
    # Labels anywhere in [1e-100, 1e100]: every path must give finite
    # probabilities summing to one; checked against mpmath.
    n, edges = hypercube(3)
    s, order = rate_scheme(n, edges)
    rng = np.random.default_rng(2)
    X = 10 ** rng.uniform(-100, 100, size=(4, len(edges)))
    for method in ("trees", "elimination", "numeric"):
        P = compile_scheme(s, method=method).steady_state(X)
        assert np.isfinite(P).all()
        for row in range(len(X)):
            ref = mp_steady_state(n, edges, X[row], dps=400)
            big = [a for a, st in enumerate(order) if ref[st] > 1e-250]
            for a in big:
                assert abs(P[row, a] - ref[order[a]]) <= 1e-11 * ref[order[a]]


def test_dict_inputs_broadcast_and_defaults():
    s = briggs_haldane()
    s2 = Scheme()
    s2.add_parameter("k1", value=1.0)
    s2.add_parameter("km1", value=0.5)
    s2.add_parameter("k2", value=1.5)
    s2.add_input("S", value=2.0)
    for e in s.edges:
        s2.add_edge(e.source, e.target, e.rate)
    m = compile_scheme(s2)
    P = m.steady_state({"S": np.array([2.0, 6.0])})
    np.testing.assert_allclose(P[:, 1], [0.5, 0.75], rtol=1e-14)
    P1 = m.steady_state({})
    np.testing.assert_allclose(P1, [[0.5, 0.5]], rtol=1e-14)


@pytest.mark.parametrize("X, fragment", [
    ({"k1": 0.0, "km1": 1, "k2": 1, "S": 1}, "must be positive"),
    ({"k1": np.nan, "km1": 1, "k2": 1, "S": 1}, "not finite"),
    ({"k1": 1, "km1": 1, "k2": 1, "S": -1}, "non-negative"),
    ({"k1": 1, "km1": 1, "k2": 1}, "has no value"),
    ({"k1": 1, "km1": 1, "k2": 1, "S": 1, "zz": 2}, "unknown symbol 'zz'"),
    (np.ones((3, 5)), "expected an (N, 4) array"),
    ({"k1": [1, 2], "km1": [1, 2, 3], "k2": 1, "S": 1}, "broadcast"),
])
def test_evaluation_refusals(X, fragment):
    m = compile_scheme(briggs_haldane())
    with pytest.raises(EvaluationError) as info:
        m.steady_state(X)
    assert fragment in str(info.value) and "\n" not in str(info.value)


def test_several_terminal_components():
    # A→B, A→C with B and C absorbing pairs: two terminal components.
    s = Scheme()
    s.add_edge("A", "B1", "a")
    s.add_edge("A", "C1", "b")
    s.add_edge("B1", "B2", "c")
    s.add_edge("B2", "B1", "d")
    s.add_edge("C1", "C2", "e")
    s.add_edge("C2", "C1", "f")
    for method in ("trees", "elimination"):
        m = compile_scheme(s, method=method)
        with pytest.raises(EvaluationError, match="2 terminal components"):
            m.steady_state(np.ones((1, 6)))
        X = np.array([[1.0, 1.0, 2.0, 3.0, 5.0, 7.0]])
        B = m.basis(X)
        assert B.shape == (1, 2, 5)
        idx = {st: i for i, st in enumerate(m.states)}
        np.testing.assert_allclose(B[0, 0, [idx["B1"], idx["B2"]]], [3 / 5, 2 / 5], rtol=1e-14)
        np.testing.assert_allclose(B[0, 1, [idx["C1"], idx["C2"]]], [7 / 12, 5 / 12], rtol=1e-14)
        assert B[0, 0, idx["A"]] == 0 and B[0, 1, idx["B1"]] == 0


def test_transient_states_get_zero():
    s = Scheme()
    s.add_edge("T", "A", "a")
    s.add_edge("A", "B", "b")
    s.add_edge("B", "A", "c")
    m = compile_scheme(s)
    P = m.steady_state(np.array([[1.0, 2.0, 3.0]]))
    idx = {st: i for i, st in enumerate(m.states)}
    assert P[0, idx["T"]] == 0
    np.testing.assert_allclose(P[0, idx["A"]], 3 / 5, rtol=1e-14)


def test_python_emit_is_deterministic_and_standalone(tmp_path):
    s = independent_sites(2)
    m = compile_scheme(s)
    a = [p.read_bytes() for p in m.emit("python", tmp_path / "a") if p.suffix == ".py"]
    b = [p.read_bytes() for p in m.emit("python", tmp_path / "b") if p.suffix == ".py"]
    assert a == b and len(a) == 1
    src = a[0].decode()
    imports = [ln for ln in src.splitlines() if ln.startswith(("import", "from"))]
    assert imports == ["import numpy as np"]
    namespace = {}
    exec(compile(src, "emitted", "exec"), namespace)
    X = np.array([[1.0, 2.0, 3.0, 4.0]])
    np.testing.assert_allclose(namespace["evaluate"](X)[0, :len(m.states)], m.steady_state(X)[0], rtol=1e-14)


def test_formula_matches_trees():
    import sympy
    s = briggs_haldane()
    m = compile_scheme(s)
    k1, km1, k2, S = sympy.symbols("k1 km1 k2 S", positive=True)
    # rho_ES = k1*S (the one tree rooted at ES); rho_E = km1 + k2.
    assert sympy.simplify(m.formula("ES") - k1 * S) == 0
    assert sympy.simplify(m.formula("E") - (km1 + k2)) == 0
    assert sympy.simplify(m.formula("ES", expand=True) - k1 * S) == 0


@pytest.mark.parametrize("method", ["trees", "elimination", "equilibrium", "numeric"])
def test_zero_concentrations_remove_edges(method):
    # Competitive inhibition (common practice; rapid-equilibrium binding
    # polynomial): with D = 1 + S/K_M + I/K_I, p_E = 1/D, p_ES = (S/K_M)/D,
    # p_EI = (I/K_I)/D, K_M = (k_off + k_cat)/k_on, K_I = ki_off/ki_on. A zero
    # concentration is an absent edge; the state it fed gets probability 0.
    from pathlib import Path
    from treeflux.compiler import load
    s = load(Path(__file__).resolve().parent.parent / "examples" / "enzyme_competitive_inhibitor.toml")
    m = compile_scheme(s, method=method)
    S = np.array([0.0, 2.0, 0.0, 5.0])
    I = np.array([0.0, 0.0, 3.0, 1.0])
    P = m.steady_state({"S": S, "I": I})
    v = s.defaults()
    KM = (v["k_off"] + v["k_cat"]) / v["k_on"]
    KI = v["ki_off"] / v["ki_on"]
    D = 1 + S / KM + I / KI
    np.testing.assert_allclose(P, np.stack([1 / D, S / KM / D, I / KI / D], axis=1), rtol=1e-14, atol=0)


def test_zero_rate_leaving_two_terminal_components_is_refused():
    s = Scheme()
    s.add_parameter("a")
    s.add_input("c")
    s.add_edge("A", "B", "a*c")
    s.add_edge("B", "A", "a")
    s.add_edge("B", "C", "a*c")
    s.add_edge("C", "B", "a*c")
    m = compile_scheme(s, method="elimination")
    with pytest.raises(EvaluationError, match="several terminal components"):
        m.steady_state({"a": 1.0, "c": 0.0})
