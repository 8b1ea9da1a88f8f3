"""Scheme generators shared by the tests (graphs, not data)."""

import itertools
import random

from treeflux.compiler import Scheme


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
