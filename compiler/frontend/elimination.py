"""Elimination front end: symbolic subtraction-free state reduction.

Eliminating state k from the chain (the censored chain on the other states;
Grassmann, Taksar & Heyman, Oper. Res. 33 (1985) 1107–1116, in continuous
time) replaces every path i→k→j by a direct rate

    q'(i→j) = q(i→j) + q(i→k) · q(k→j) / d_k,      d_k = Σ_m q(k→m)

(i→i terms are dropped: the diagonal is never stored, it is always the sum of
the off-diagonal rates). Nothing is subtracted. After all states but the root
r are gone, back-substitution in reverse order gives

    x_r = 1,    x_k = Σ_i x_i · t_ik,   t_ik = q(i→k) / d_k

over the in-edges k had when it was eliminated (t_ik is shared with the
forward sweep), and x_k = ρ_k / ρ_r: the ratio
of Kirchhoff minors, so p = x / Σ x is exactly the Matrix-Tree steady state.
The product of the pivots d_k is ρ_r itself. The order comes from
:func:`treeflux.runtime.numeric.elimination_order` (greedy minimum fill);
accuracy does not depend on it, the size of the DAG does.
"""

from __future__ import annotations

from dataclasses import dataclass

from ..ir import Graph


@dataclass
class Reduction:
    """What symbolic elimination of one component produced."""

    x: list[int]          # IR nodes of x_i = ρ_i / ρ_root, component order
    pivots: list[int]     # IR nodes d_k in elimination order
    order: list[int]      # elimination order (last = root)
    fill: int             # edges created that the scheme did not have


def reduce(graph: Graph, n: int, edges, labels: list[int], *, order=None) -> Reduction:
    """Eliminate all states of a strongly connected component but the last in ``order``."""
    if order is None:
        from treeflux.runtime.numeric import elimination_order
        order = elimination_order(n, list(edges))
    out: list[dict[int, int]] = [dict() for _ in range(n)]
    inn: list[dict[int, int]] = [dict() for _ in range(n)]
    for (i, j), lab in zip(edges, labels):
        out[i][j] = lab
        inn[j][i] = lab
    fill = 0
    pivots, saved = [], []
    for k in order[:-1]:
        targets = sorted(out[k])
        sources = sorted(inn[k])
        d = graph.add(*[out[k][j] for j in targets])
        pivots.append(d)
        ts = []
        for i in sources:
            t = graph.div(inn[k][i], d)
            ts.append((i, t))
            for j in targets:
                if j == i:
                    continue
                via = graph.mul(t, out[k][j])
                old = out[i].get(j)
                if old is None:
                    fill += 1
                    new = via
                else:
                    new = graph.add(old, via)
                out[i][j] = new
                inn[j][i] = new
        saved.append(ts)
        for i in sources:
            del out[i][k]
        for j in targets:
            del inn[j][k]
        out[k].clear()
        inn[k].clear()
    one = graph.const(1)
    x = [None] * n
    x[order[-1]] = one
    for k, ins in zip(reversed(order[:-1]), reversed(saved)):
        x[k] = graph.add(*[t if x[i] == one else graph.mul(x[i], t) for i, t in ins])
    return Reduction(x, pivots, list(order), fill)
