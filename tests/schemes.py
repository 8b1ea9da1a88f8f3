"""Scheme generators and the mpmath reference solve shared by the tests."""

import itertools
import random

import mpmath

from treeflux.compiler import Scheme


def mp_steady_state(n, edges, rates, *, dps=50, floats=True):
    """Reference steady state: mpmath LU solve of L p = 0 with the first
    equation replaced by Σp = 1, at ``dps`` digits. Rates may be floats or
    mpf (kept exact). Returns floats, or mpf values with ``floats=False``."""
    with mpmath.workdps(dps):
        L = mpmath.zeros(n, n)
        for (i, j), k in zip(edges, rates):
            k = k if isinstance(k, mpmath.mpf) else mpmath.mpf(float(k))
            L[j, i] += k
            L[i, i] -= k
        for c in range(n):
            L[0, c] = 1
        b = mpmath.zeros(n, 1)
        b[0] = 1
        p = mpmath.lu_solve(L, b)
        return [float(v) for v in p] if floats else [p[i] for i in range(n)]


def rate_scheme(n, edges):
    """A scheme with symbol k<e> on edge e; also the state index of each scheme state."""
    s = Scheme()
    for e, (i, j) in enumerate(edges):
        s.add_edge(f"s{i}", f"s{j}", f"k{e}")
    order = [int(name[1:]) for name in s.states]
    return s, order


def hypercube_scheme(d):
    """Q_d as a Scheme: states s<i>, an independent symbol k<i>_<j> on each edge."""
    s = Scheme(name=f"q{d}")
    for i, j in hypercube(d)[1]:
        s.add_edge(f"s{i}", f"s{j}", f"k{i}_{j}")
    return s


def lattice(a, b):
    """An a×b grid, moves to the four neighbours: (n, edges) with state r*b + c."""
    edges = []
    for r in range(a):
        for c in range(b):
            s = r * b + c
            if c + 1 < b:
                edges += [(s, s + 1), (s + 1, s)]
            if r + 1 < a:
                edges += [(s, s + b), (s + b, s)]
    return a * b, edges


def hypercube(d):
    """The d-cube as a symmetric digraph: states 0..2^d-1, flips of one bit."""
    n = 2 ** d
    return n, [(i, i ^ (1 << b)) for i in range(n) for b in range(d)]


def independent_sites(k):
    """k independent two-state sites: states are bit strings, site i turns on
    with rate on_i and off with off_i (symbols on0, off0, on1, off1, ...)."""
    s = Scheme()
    for i in range(k):
        s.add_parameter(f"on{i}")
        s.add_parameter(f"off{i}")
    for bits in itertools.product("01", repeat=k):
        for i in range(k):
            if bits[i] == "0":
                other = bits[:i] + ("1",) + bits[i + 1:]
                s.add_edge("".join(bits), "".join(other), f"on{i}")
                s.add_edge("".join(other), "".join(bits), f"off{i}")
    return s


def random_strong_graph(n, *, extra, rng=None):
    """A random strongly connected digraph: a random Hamiltonian cycle plus
    ``extra`` random edges (no duplicates, no self-loops)."""
    rng = rng or random.Random(0)
    perm = list(range(n))
    rng.shuffle(perm)
    edges = {(perm[i], perm[(i + 1) % n]) for i in range(n)}
    candidates = [(i, j) for i in range(n) for j in range(n) if i != j and (i, j) not in edges]
    rng.shuffle(candidates)
    edges.update(candidates[:extra])
    return sorted(edges)


def exact_solve(A, b):
    """Gauss-Jordan elimination in exact rationals (lists of Fractions)."""
    n = len(A)
    M = [list(row) + [x] for row, x in zip(A, b)]
    for c in range(n):
        piv = next(r for r in range(c, n) if M[r][c] != 0)
        M[c], M[piv] = M[piv], M[c]
        for r in range(n):
            if r != c and M[r][c] != 0:
                f = M[r][c] / M[c][c]
                M[r] = [x - f * y for x, y in zip(M[r], M[c])]
    return [M[r][n] / M[r][r] for r in range(n)]


def exact_steady_state(scheme, values):
    """{state: Fraction}: labels evaluated exactly at ``values`` (name → Fraction),
    then L p = 0, Σ p = 1 solved in exact rationals (a scheme with one terminal
    component)."""
    from fractions import Fraction

    from treeflux.compiler.ir import Graph, evaluate, lower_label

    g = Graph()
    column = {name: j for j, name in enumerate(scheme.symbols)}
    nodes = [lower_label(g, e.label, column) for e in scheme.edges]
    rates = evaluate(g, nodes, [values[s] for s in scheme.symbols], "exact")
    n = len(scheme.states)
    A = [[Fraction(0)] * n for _ in range(n)]
    for (i, j), k in zip(scheme.edge_list(), rates):
        A[j][i] += k
        A[i][i] -= k
    A[0] = [Fraction(1)] * n
    p = exact_solve(A, [Fraction(1)] + [Fraction(0)] * (n - 1))
    return dict(zip(scheme.states, p))
