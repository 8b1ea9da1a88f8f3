"""Tests for treeflux.compiler.structure: components, cycles, tree counts, detailed balance."""

from __future__ import annotations

import itertools
import json
import math
import random
from fractions import Fraction

import networkx as nx
import numpy as np
import pytest

from treeflux.compiler.errors import ModelError
from treeflux.compiler.model import Scheme
from treeflux.compiler.structure import (
    cycle_basis, detailed_balance, is_reversible, strongly_connected_components,
    structure_profile, terminal_components, tree_counts,
)


# ------------------------------------------------------------------ helpers

def complete(n):
    return [(i, j) for i in range(n) for j in range(n) if i != j]


def hypercube(d):
    n = 2 ** d
    return n, [(i, i ^ (1 << b)) for i in range(n) for b in range(d)]


def random_digraph(n, m, seed, *, strongly=True):
    rng = random.Random(seed)
    edges = set()
    if strongly:  # a Hamiltonian cycle through a random permutation
        perm = list(range(n))
        rng.shuffle(perm)
        edges.update((perm[k], perm[(k + 1) % n]) for k in range(n))
    while len(edges) < m:
        i, j = rng.randrange(n), rng.randrange(n)
        if i != j:
            edges.add((i, j))
    return sorted(edges)


def brute_force_counts(n, edges):
    """Count in-trees by enumerating one out-edge choice per non-root state."""
    out = [[j for (i, j) in edges if i == s and j != s] for s in range(n)]
    counts = []
    for root in range(n):
        others = [s for s in range(n) if s != root]
        total = 0
        for choice in itertools.product(*(out[s] for s in others)):
            nxt = dict(zip(others, choice))
            ok = True
            for s in others:
                seen, v = set(), s
                while v != root:
                    if v in seen:
                        ok = False
                        break
                    seen.add(v)
                    v = nxt[v]
                if not ok:
                    break
            total += ok
        counts.append(total)
    return counts


def minor_det_fraction(n, edges, root):
    """det of the out-degree Laplacian with row and column ``root`` removed,
    by dense Gaussian elimination over the rationals (independent of the module)."""
    K = [[Fraction(0)] * n for _ in range(n)]
    for i, j in edges:
        K[i][i] += 1
        K[i][j] -= 1
    keep = [s for s in range(n) if s != root]
    M = [[K[i][j] for j in keep] for i in keep]
    size, det = len(M), Fraction(1)
    for c in range(size):
        p = next((r for r in range(c, size) if M[r][c] != 0), None)
        if p is None:
            return 0
        if p != c:
            M[c], M[p] = M[p], M[c]
            det = -det
        det *= M[c][c]
        for r in range(c + 1, size):
            f = M[r][c] / M[c][c]
            if f:
                M[r] = [a - f * b for a, b in zip(M[r], M[c])]
    assert det.denominator == 1
    return int(det)


def minor_det_mod(n, edges, root, p):
    """det of the same minor modulo a prime p < 2**31 (numpy int64, exact)."""
    K = np.zeros((n, n), dtype=np.int64)
    for i, j in edges:
        K[i, i] += 1
        K[i, j] -= 1
    keep = [s for s in range(n) if s != root]
    M = K[np.ix_(keep, keep)] % p
    det = 1
    for c in range(M.shape[0]):
        nz = np.nonzero(M[c:, c])[0]
        if nz.size == 0:
            return 0
        r = c + int(nz[0])
        if r != c:
            M[[c, r]] = M[[r, c]]
            det = -det
        piv = int(M[c, c])
        det = det * piv % p
        inv = pow(piv, p - 2, p)
        f = (M[c + 1:, c] * inv) % p
        M[c + 1:, c:] = (M[c + 1:, c:] - (f[:, None] * M[c, c:][None, :]) % p) % p
    return det % p


def ring_scheme(forward, reverse, names=("A", "B", "C")):
    s = Scheme()
    k = len(names)
    for a in range(k):
        b = (a + 1) % k
        s.add_edge(names[a], names[b], forward[a])
        s.add_edge(names[b], names[a], reverse[a])
    return s


# ------------------------------------------------------------------ components

@pytest.mark.parametrize("seed", range(6))
def test_scc_matches_networkx(seed):
    n = 30
    edges = random_digraph(n, 45, seed, strongly=False)
    ours = strongly_connected_components(n, edges)
    G = nx.DiGraph()
    G.add_nodes_from(range(n))
    G.add_edges_from(edges)
    # reference: networkx.strongly_connected_components
    ref = sorted((sorted(c) for c in nx.strongly_connected_components(G)), key=lambda c: c[0])
    assert ours == ref
    # reference: networkx attracting components are the terminal ones
    ref_t = sorted((sorted(c) for c in nx.attracting_components(G)), key=lambda c: c[0])
    assert terminal_components(n, edges) == ref_t


def test_scc_small_order_and_isolated():
    edges = [(3, 1), (1, 3), (0, 2), (2, 0), (2, 1)]
    assert strongly_connected_components(5, edges) == [[0, 2], [1, 3], [4]]
    assert terminal_components(5, edges) == [[1, 3], [4]]
    assert strongly_connected_components(0, []) == []


def test_scc_ten_thousand_states_iterative():
    n = 10_000
    ring = [(i, (i + 1) % n) for i in range(n)]
    assert strongly_connected_components(n, ring) == [list(range(n))]
    path = [(i, i + 1) for i in range(n - 1)]
    comps = strongly_connected_components(n, path)
    assert comps == [[i] for i in range(n)]
    assert terminal_components(n, path) == [[n - 1]]


def test_terminal_components_two_sinks():
    # A -> B <-> C, A -> D <-> E, F -> A: closed classes {B, C} and {D, E}
    edges = [(0, 1), (1, 2), (2, 1), (0, 3), (3, 4), (4, 3), (5, 0)]
    assert terminal_components(6, edges) == [[1, 2], [3, 4]]
    assert tree_counts(6, edges) == [0] * 6  # two closed classes: no state reachable from all


def test_is_reversible():
    assert is_reversible(3, [(0, 1), (1, 0), (1, 2), (2, 1)])
    assert not is_reversible(3, [(0, 1), (1, 0), (1, 2)])
    assert is_reversible(2, [])


# ------------------------------------------------------------------ cycles

def test_cycle_basis_ring_and_tree():
    assert cycle_basis(3, [(0, 1), (1, 0), (1, 2), (2, 1), (2, 0), (0, 2)]) == [[0, 1, 2]]
    assert cycle_basis(4, [(0, 1), (1, 2), (1, 3)]) == []
    # square 0-1-2-3: BFS from 0 reaches 1 and 3, then 2 via 1; non-tree pair {2, 3}
    assert cycle_basis(4, [(0, 1), (1, 2), (2, 3), (3, 0)]) == [[0, 1, 2, 3]]


def _gf2_rank(vectors):
    rows = [v for v in vectors]
    rank = 0
    while rows:
        pivot = rows.pop()
        if pivot == 0:
            continue
        rank += 1
        low = pivot & -pivot
        rows = [r ^ pivot if r & low else r for r in rows]
    return rank


@pytest.mark.parametrize("seed", range(5))
def test_cycle_basis_is_a_basis(seed):
    n = 25
    edges = random_digraph(n, 40, seed, strongly=False)
    pairs = sorted({(min(i, j), max(i, j)) for i, j in edges})
    bit = {p: k for k, p in enumerate(pairs)}
    G = nx.Graph(pairs)
    G.add_nodes_from(range(n))
    parts = nx.number_connected_components(G)
    cycles = cycle_basis(n, edges)
    # dimension of the cycle space m - n + c (common practice; networkx agrees)
    assert len(cycles) == len(pairs) - n + parts == len(nx.cycle_basis(G))
    vectors = []
    for c in cycles:
        assert len(set(c)) == len(c) >= 3
        v = 0
        for a, b in zip(c, c[1:] + c[:1]):
            v |= 1 << bit[(min(a, b), max(a, b))]
        vectors.append(v)
    assert _gf2_rank(vectors) == len(cycles)  # independent over GF(2)
    assert cycle_basis(n, edges) == cycles    # deterministic


# ------------------------------------------------------------------ tree counts

@pytest.mark.parametrize("n", range(2, 8))
def test_tree_counts_cayley(n):
    # Cayley (1889): n^(n-2) labelled trees on n vertices; each orients uniquely toward a root
    assert tree_counts(n, complete(n)) == [n ** (n - 2)] * n


def test_tree_counts_hypercubes():
    n, edges = hypercube(3)
    assert tree_counts(n, edges) == [384] * n                 # OEIS A091664
    n, edges = hypercube(4)
    assert tree_counts(n, edges) == [42_467_328] * n          # OEIS A091664
    n, edges = hypercube(5)
    q5 = tree_counts(n, edges)
    assert q5 == [20_776_019_874_734_407_680] * n             # OEIS A091664 (from memory)
    # Kirchhoff's eigenvalue form with the spectrum of Q_d (eigenvalue 2k with
    # multiplicity C(d, k); common practice): tau = 2^(2^d-d-1) * prod k^C(d,k)
    for d in (3, 4, 5, 6):
        n, edges = hypercube(d)
        closed = 2 ** (2 ** d - d - 1) * math.prod(k ** math.comb(d, k) for k in range(1, d + 1))
        assert tree_counts(n, edges) == [closed] * n
    # networkx.number_of_spanning_trees (float determinant) on the undirected Q5
    G = nx.hypercube_graph(5)
    assert q5[0] == pytest.approx(nx.number_of_spanning_trees(G), rel=1e-9)


@pytest.mark.parametrize("seed", range(8))
def test_tree_counts_vs_networkx_random(seed):
    n = 7
    edges = random_digraph(n, 16, seed, strongly=seed % 2 == 0)
    ours = tree_counts(n, edges)
    # networkx counts arborescences directed away from the root: use the reversed graph
    R = nx.DiGraph()
    R.add_nodes_from(range(n))
    R.add_edges_from((j, i) for i, j in edges)
    ref = [round(nx.number_of_spanning_trees(R, root=r)) for r in range(n)]
    assert ours == ref


@pytest.mark.parametrize("seed", range(12))
def test_tree_counts_vs_brute_force(seed):
    rng = random.Random(100 + seed)
    n = rng.randint(2, 6)
    edges = []
    if seed % 2 == 0:  # a ring through every state, then extra edges: strongly connected
        edges = [(s, (s + 1) % n) for s in range(n)]
    edges += [(rng.randrange(n), rng.randrange(n)) for _ in range(rng.randint(1, 2 * n))]
    edges = [(i, j) for i, j in edges if i != j]
    # parallel edges are allowed and count as separate trees
    ref = brute_force_counts(n, edges)
    assert tree_counts(n, edges) == ref
    if seed % 2 == 0:
        assert min(ref) > 0


def test_tree_counts_transient_states():
    # 0 -> 1 <-> 2, 0 -> 2, 3 -> 0: closed class {1, 2}; 0 and 3 are transient
    edges = [(0, 1), (0, 2), (1, 2), (2, 1), (3, 0)]
    counts = tree_counts(4, edges)
    assert counts == brute_force_counts(4, edges)
    # by hand: root 1 -> 2 must point at 1, 0 picks 1 or 2, 3 must point at 0
    assert counts == [0, 2, 2, 0]


def test_tree_counts_small_cases():
    assert tree_counts(0, []) == []
    assert tree_counts(1, []) == [1]
    assert tree_counts(2, [(0, 1)]) == [0, 1]
    assert tree_counts(2, [(0, 1), (0, 1), (1, 0)]) == [1, 2]
    assert tree_counts(3, [(0, 1), (1, 1), (1, 2)]) == [0, 0, 1]  # self-loop ignored


def test_tree_counts_forty_states_exact_minors():
    n = 40
    edges = random_digraph(n, 110, seed=7)
    counts = tree_counts(n, edges)
    for root in (0, 13, 39):
        # Tutte's directed Matrix-Tree theorem, minor computed over Fractions here
        assert counts[root] == minor_det_fraction(n, edges, root)


def test_tree_counts_two_hundred_states():
    n = 200
    edges = random_digraph(n, 600, seed=11)
    counts = tree_counts(n, edges)
    assert all(c > 0 for c in counts)
    # stationarity, exactly: sum_i rho_i w(i->j) = rho_j outdeg(j) (L rho = 0)
    inflow = [0] * n
    outdeg = [0] * n
    for i, j in edges:
        inflow[j] += counts[i]
        outdeg[i] += 1
    assert inflow == [counts[j] * outdeg[j] for j in range(n)]
    # Tutte's theorem modulo two primes, minor eliminated independently with numpy
    for p in (2_147_483_647, 2_147_483_629):
        assert counts[5] % p == minor_det_mod(n, edges, 5, p)


# ------------------------------------------------------------------ detailed balance

def test_detailed_balance_conditional_ring():
    s = ring_scheme(["k1", "k2", "k3"], ["m1", "m2", "m3"])
    r = detailed_balance(s)
    assert r["verdict"] == "conditional"
    assert r["cycles"] == [["A", "B", "C"]]
    assert r["conditions"] == ["k1*k2*k3 = m1*m2*m3"]


def test_detailed_balance_identical_ring():
    # energy-style labels: A->B = a*gB/gA etc.; the product ratio telescopes to 1
    s = ring_scheme(["a*gB/gA", "b*gC/gB", "c*gA/gC*x"], ["a", "b", "c*x"])
    r = detailed_balance(s)
    assert r["verdict"] is True and r["conditions"] == []
    s = ring_scheme(["exp(u)", "exp(v)", "2"], ["1", "2", "exp(u+v)"])
    assert detailed_balance(s)["verdict"] is True
    s = ring_scheme(["log(a*b)", "1", "1"], ["log(a)+log(b)", "1", "1"])
    assert detailed_balance(s)["verdict"] is True


def test_detailed_balance_numeric_violation():
    s = ring_scheme(["2", "3", "1"], ["1", "1", "5"])   # 6 != 5
    r = detailed_balance(s)
    assert r["verdict"] is False and "A->B->C->A" in r["reason"]
    s = ring_scheme(["k*2", "3", "1"], ["k", "1", "5"])  # k cancels: 6/5 for all k
    assert detailed_balance(s)["verdict"] is False
    s = ring_scheme(["sqrt(2)", "sqrt(3)", "1"], ["1", "1", "sqrt(6)"])
    assert detailed_balance(s)["verdict"] is True


def test_detailed_balance_not_reversible():
    s = Scheme()
    s.add_edge("A", "B", "k1")
    s.add_edge("B", "A", "k2")
    s.add_edge("B", "C", "k3")
    s.add_edge("C", "A", "k4")
    r = detailed_balance(s)
    assert r["verdict"] is False and "B->C" in r["reason"]


def test_detailed_balance_tree_shaped_and_square():
    s = Scheme()
    s.add_edge("A", "B", "k1")
    s.add_edge("B", "A", "k2")
    s.add_edge("B", "C", "k3")
    s.add_edge("C", "B", "k4")
    assert detailed_balance(s)["verdict"] is True
    sq = ring_scheme(["k1", "k2", "k3", "k4"], ["k2", "k3", "k4", "k1"], names=("W", "X", "Y", "Z"))
    r = detailed_balance(sq)
    assert r["verdict"] is True and r["cycles"] == [["W", "X", "Y", "Z"]]


# ------------------------------------------------------------------ profile

def test_structure_profile():
    s = ring_scheme(["k1*c", "k2", "k3"], ["m1", "m2", "m3"])
    p = structure_profile(s)
    assert json.loads(json.dumps(p)) == p
    assert p["states"] == ["A", "B", "C"]
    assert p["edges"] == 6
    assert p["strongly_connected"] is True and p["reversible"] is True
    assert p["terminal_components"] == [["A", "B", "C"]]
    assert p["detailed_balance"] == "conditional"
    assert p["detailed_balance_conditions"] == ["c*k1*k2*k3 = m1*m2*m3"]
    assert p["trees"] == {"A": "3", "B": "3", "C": "3"}   # Cayley: 3^(3-2)
    assert p["implicit_symbols"] is True

    t = Scheme()
    t.add_parameter("k")
    t.add_edge("X", "Y", "k")
    t.add_edge("X", "Z", "k")
    q = structure_profile(t)
    assert q["strongly_connected"] is False and q["reversible"] is False
    assert q["terminal_components"] == [["Y"], ["Z"]]
    assert q["trees"] == {"X": "0", "Y": "0", "Z": "0"}
    assert q["detailed_balance"] is False and q["implicit_symbols"] is False


def test_profile_big_tree_counts_are_exact_strings():
    s = Scheme()
    n, edges = hypercube(5)
    for i, j in edges:
        s.add_edge(f"S{i}", f"S{j}", f"k{i}_{j}")
    p = structure_profile(s)
    assert set(p["trees"].values()) == {"20776019874734407680"}  # OEIS A091664 (from memory)
    assert p["detailed_balance"] == "conditional"
    assert len(p["detailed_balance_conditions"]) == 80 - 32 + 1


# ------------------------------------------------------------------ bad input

@pytest.mark.parametrize("n, edges, words", [
    (-1, [], "non-negative"),
    (3, [(0, 3)], "0..2"),
    (3, [(0,)], "not a pair"),
    (2, [(0, 1.0)], "integer"),
])
def test_bad_graph_input(n, edges, words):
    with pytest.raises(ModelError, match=words):
        tree_counts(n, edges)


def test_profile_refuses_empty_scheme():
    with pytest.raises(ModelError, match="empty"):
        structure_profile(Scheme())
