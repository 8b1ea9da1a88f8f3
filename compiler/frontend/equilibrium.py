"""Equilibrium front end: path products under detailed balance.

When the labels satisfy detailed balance identically (Kolmogorov's criterion:
around every cycle the product of forward labels equals the product of the
reverse ones), the steady state is the equilibrium distribution and

    ρ_i / ρ_r = Π over the edges a→b of any path r → i of ℓ(a→b) / ℓ(b→a)

(Kolmogorov, Math. Ann. 112 (1936) 155–160; Hill, Free Energy Transduction
in Biology, 1977). One ratio per state: O(n) to evaluate. The path is the
breadth-first tree from the root over reversible pairs. Whether detailed
balance holds is decided by :mod:`treeflux.compiler.structure`, never here.
"""

from __future__ import annotations

from collections import deque

from ..ir import Graph


def path_products(graph: Graph, n: int, edges, labels: list[int], *, root: int = 0) -> list[int]:
    """IR nodes of x_i = ρ_i / ρ_root for a reversible component."""
    rate = {e: lab for e, lab in zip(edges, labels)}
    nbrs = [[] for _ in range(n)]
    for i, j in edges:
        if (j, i) in rate:
            nbrs[i].append(j)
    one = graph.const(1)
    x = [None] * n
    x[root] = one
    queue = deque([root])
    while queue:
        a = queue.popleft()
        for b in sorted(nbrs[a]):
            if x[b] is None:
                step = graph.div(rate[(a, b)], rate[(b, a)])
                x[b] = step if x[a] == one else graph.mul(x[a], step)
                queue.append(b)
    if any(v is None for v in x):
        raise ValueError("equilibrium path products need every state joined by reversible pairs")
    return x
