"""Benchmarks for exact tree counts (treeflux.compiler.structure.tree_counts).

Goal: all n rooted tree counts of a graph cost less than one dense
fraction-free (Bareiss) determinant of a single Laplacian minor, the textbook
route (which would need n of them). Measured as a ratio in the same run.

Run: cd /work/main && python -m pytest benches/bench_structure.py -q
"""

from __future__ import annotations

import random
import time

import pytest

from treeflux.compiler.structure import detailed_balance, tree_counts
from treeflux.compiler.model import Scheme


def hypercube(d):
    n = 2 ** d
    return n, [(i, i ^ (1 << b)) for i in range(n) for b in range(d)]


def random_strong(n, m, seed):
    rng = random.Random(seed)
    perm = list(range(n))
    rng.shuffle(perm)
    edges = {(perm[k], perm[(k + 1) % n]) for k in range(n)}
    while len(edges) < m:
        i, j = rng.randrange(n), rng.randrange(n)
        if i != j:
            edges.add((i, j))
    return n, sorted(edges)


def dense_bareiss_minor(n, edges, root):
    """Baseline: dense Bareiss determinant of the minor of K = D_out - A at root."""
    K = [[0] * n for _ in range(n)]
    for i, j in edges:
        K[i][i] += 1
        K[i][j] -= 1
    keep = [s for s in range(n) if s != root]
    M = [[K[i][j] for j in keep] for i in keep]
    size, prev, sign = len(M), 1, 1
    for k in range(size - 1):
        if M[k][k] == 0:
            swap = next((r for r in range(k + 1, size) if M[r][k]), None)
            if swap is None:
                return 0
            M[k], M[swap] = M[swap], M[k]
            sign = -sign
        pk, row_k = M[k][k], M[k]
        for i in range(k + 1, size):
            a, row_i = M[i][k], M[i]
            for j in range(k + 1, size):
                row_i[j] = (row_i[j] * pk - a * row_k[j]) // prev
        prev = pk
    return sign * M[-1][-1]


def _best_of(fn, repeat=3):
    best = float("inf")
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t)
    return best


@pytest.mark.parametrize("case", ["Q6", "random100"])
def test_tree_counts_vs_one_dense_minor(benchmark, case):
    n, edges = hypercube(6) if case == "Q6" else random_strong(100, 300, seed=3)
    counts = benchmark(tree_counts, n, edges)
    baseline = _best_of(lambda: dense_bareiss_minor(n, edges, 0))
    assert dense_bareiss_minor(n, edges, 0) == counts[0]
    ratio = benchmark.stats.stats.min / baseline
    benchmark.extra_info["ratio_all_roots_vs_one_dense_minor"] = ratio
    assert ratio < 1.0


def test_tree_counts_200_states(benchmark):
    n, edges = random_strong(200, 600, seed=11)
    counts = benchmark.pedantic(tree_counts, args=(n, edges), rounds=3, iterations=1)
    assert min(counts) > 0


def test_detailed_balance_q6(benchmark):
    s = Scheme()
    n, edges = hypercube(6)
    for i, j in edges:
        s.add_edge(f"S{i}", f"S{j}", f"k{i}_{j}")
    r = benchmark.pedantic(detailed_balance, args=(s,), rounds=2, iterations=1)
    assert r["verdict"] == "conditional" and len(r["conditions"]) == 192 - 64 + 1
