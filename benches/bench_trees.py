"""Tree front end throughput: spanning trees streamed into the IR per second.

Goal: at least 100,000 trees per second into the IR (rooted trees of every
state, each a product node of n−1 labels). Baseline in the same run:
networkx's ArborescenceIterator on the same graph (a general-purpose
enumerator; TECH-NOTES measured about 200 trees/s), counted over a fixed
number of trees because it is far slower.
"""

import time

import networkx as nx

from treeflux.compiler import ir
from treeflux.compiler.frontend.trees import rooted_trees, tree_sums

N_STATES = 7  # complete digraph K7: 7^5 = 16,807 trees per root (Cayley), 117,649 in all
EDGES = [(i, j) for i in range(N_STATES) for j in range(N_STATES) if i != j]
TOTAL_TREES = N_STATES ** (N_STATES - 2) * N_STATES


def _into_ir():
    g = ir.Graph()
    labels = [g.input(e) for e in range(len(EDGES))]
    rho = tree_sums(g, N_STATES, EDGES, labels, scale=True)
    return g, rho


def test_trees_into_ir(benchmark):
    g, rho = benchmark.pedantic(_into_ir, rounds=3, iterations=1)
    assert len(g.args[rho[0]]) == N_STATES ** (N_STATES - 2)
    seconds = benchmark.stats.stats.median
    rate = TOTAL_TREES / seconds
    benchmark.extra_info.update(trees=TOTAL_TREES, trees_per_second=round(rate),
                                goal_trees_per_second=100_000, goal_met=rate >= 100_000)


def test_enumeration_only(benchmark):
    count = benchmark.pedantic(lambda: sum(1 for r in range(N_STATES)
                                           for _ in rooted_trees(N_STATES, EDGES, r)),
                               rounds=3, iterations=1)
    assert count == TOTAL_TREES
    benchmark.extra_info.update(trees_per_second=round(TOTAL_TREES / benchmark.stats.stats.median))


def test_networkx_baseline(benchmark):
    G = nx.DiGraph()
    G.add_edges_from((j, i) for i, j in EDGES)  # networkx arborescences point away from the root
    limit = 300

    def run():
        it = nx.algorithms.tree.branchings.ArborescenceIterator(G)
        t = time.perf_counter()
        n = 0
        for _ in it:
            n += 1
            if n >= limit:
                break
        return n, time.perf_counter() - t

    n, seconds = benchmark.pedantic(run, rounds=1, iterations=1)
    benchmark.extra_info.update(trees=n, trees_per_second=round(n / seconds))
