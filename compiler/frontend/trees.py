"""Tree front end: the Matrix-Tree theorem by enumeration of spanning trees.

For a strongly connected scheme the steady state is p_i = ρ_i / Σ_j ρ_j with

    ρ_i = Σ over spanning trees T rooted at i (every edge pointing toward i)
          of Π_{e ∈ T} ℓ(e)

(Kirchhoff 1847; Tutte, Proc. Cambridge Philos. Soc. 44 (1948) 463–482, for
directed graphs; Hill, J. Theor. Biol. 10 (1966) 442–459, for kinetic
diagrams). Every term is positive, so the formula is subtraction-free.

Enumeration is a backtracking search of our own: the non-root states are
visited in breadth-first order of their distance to the root (so most choices
attach to the growing tree at once); each picks one out-edge, and a choice is
refused when following the chosen parents from it leads back to the state
itself (a cycle). When every state has a parent, the parents form a spanning
tree rooted at the root. Each tree is streamed straight into the IR as a
product node; nothing else is kept per tree.

Every tree has n−1 edges, so ρ_i is homogeneous of degree n−1 in the labels:
dividing every label by a common scale s leaves p unchanged. The front end
divides by s = max of the labels of the row, so no product can overflow.
"""

from __future__ import annotations

from collections import deque

from ..ir import Graph

# Refuse enumeration beyond this many tree products in total (Σ over roots of
# the tree count, times n−1 factors); the elimination front end has no limit.
MAX_TREE_FACTORS = 4_000_000


def rooted_trees(n: int, edges: list[tuple[int, int]], root: int):
    """Yield each spanning tree rooted at ``root`` as a tuple of edge indices.

    ``edges`` are (source, target) pairs on states 0..n−1; a tree holds, for
    every state but the root, the index of its one out-edge in the tree.
    """
    out = [[] for _ in range(n)]
    back = [[] for _ in range(n)]
    for e, (i, j) in enumerate(edges):
        out[i].append((j, e))
        back[j].append(i)
    dist = [-1] * n
    dist[root] = 0
    queue = deque([root])
    order = []
    while queue:
        v = queue.popleft()
        for u in back[v]:
            if dist[u] < 0:
                dist[u] = dist[v] + 1
                order.append(u)
                queue.append(u)
    if len(order) != n - 1:
        return  # some state cannot reach the root: no spanning tree
    parent = [-1] * n
    parent[root] = root
    chosen = [0] * (n - 1)
    choices = [out[v] for v in order]
    m = n - 1

    def place(level: int):
        if level == m:
            yield tuple(chosen)
            return
        v = order[level]
        for w, e in choices[level]:
            u = w
            while u != root and parent[u] >= 0 and u != v:
                u = parent[u]
            if u == v:
                continue  # choosing w would close a cycle through v
            parent[v] = w
            chosen[level] = e
            yield from place(level + 1)
        parent[v] = -1

    if n == 1:
        yield ()
        return
    yield from place(0)


def tree_sums(graph: Graph, n: int, edges, labels: list[int], *, scale: bool = True) -> list[int]:
    """IR nodes of ρ_i for every state i of a strongly connected component.

    ``labels[e]`` is the IR node of the label of ``edges[e]``. With ``scale``
    the labels are first divided by their maximum (see the module docstring).
    """
    if scale and len(labels) > 1:
        s = graph.max(*labels)
        labels = [graph.div(l, s) for l in labels]
    rho = []
    for r in range(n):
        mul = graph.mul
        terms = [mul(*[labels[e] for e in tree]) if tree else graph.const(1)
                 for tree in rooted_trees(n, edges, r)]
        rho.append(graph.add(*terms))
    return rho
