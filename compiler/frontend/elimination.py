"""Elimination front end: symbolic subtraction-free state reduction.

Eliminating state k from the chain (the censored chain on the other states;
Grassmann, Taksar & Heyman, Oper. Res. 33 (1985) 1107–1116, in continuous
time) replaces every path i→k→j by a direct rate

    q'(i→j) = q(i→j) + q(i→k) · w_kj,   w_kj = q(k→j) / d_k,   d_k = Σ_m q(k→m)

(i→i terms are dropped: the diagonal is never stored, it is always the sum of
the off-diagonal rates). Nothing is subtracted. After all states but the root
r are gone, back-substitution in reverse order gives

    x_r = 1,    x_k = (Σ_i x_i · q(i→k)) / d_k

over the in-edges k had when it was eliminated, and x_k = ρ_k / ρ_r: the ratio
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
    depth0: int = 0       # scale-free values (w, x) are ≥ R^-depth0 (see below)
    depth1: int = 0       # rates (censored rates, pivots, back-substitution sums) are ≥ lo · R^-depth1


def reduce(graph: Graph, n: int, edges, labels: list[int], *, order=None) -> Reduction:
    """Eliminate all states of a strongly connected component but the last in ``order``.

    Forward, the out-rates of the pivot are scaled, w_kj = q(k→j)/d_k ≤ 1, and
    q(i→j) += q(i→k)·w_kj; backward, x_k = (Σ_i x_i q(i→k)) / d_k. Every
    value is a rate of a censored chain (≤ the original exit rate), a
    probability w, or a ratio x.

    Underflow bounds (used by the run-time guard): with lo and hi the
    smallest and largest label of a set, D the largest out-degree and
    R = D·hi/lo, every value reached through h divisions by a pivot is at
    least lo·R^-h (rates) or R^-h (w and x). The depths are counted here
    along the actual elimination, so the guard can be as loose as the
    structure allows.
    """
    if order is None:
        from treeflux.runtime.numeric import elimination_order
        order = elimination_order(n, list(edges))
    out: list[dict[int, int]] = [dict() for _ in range(n)]
    inn: list[dict[int, int]] = [dict() for _ in range(n)]
    depth: dict[int, int] = {}               # IR node → h with value ≥ lo·R^-h
    for (i, j), lab in zip(edges, labels):
        out[i][j] = lab
        inn[j][i] = lab
        depth[lab] = 0
    fill = 0
    deep0 = deep1 = 0
    pivots, saved = [], []
    for k in order[:-1]:
        targets = sorted(out[k])
        sources = sorted(inn[k])
        d = graph.add(*[out[k][j] for j in targets])
        hd = min(depth[out[k][j]] for j in targets)
        deep1 = max(deep1, hd)
        pivots.append(d)
        ws = {}
        for j in targets:
            ws[j] = (graph.div(out[k][j], d), depth[out[k][j]] + 1)
            deep0 = max(deep0, ws[j][1])
        ins = []
        for i in sources:
            q = inn[k][i]
            ins.append((i, q, depth[q]))
            deep1 = max(deep1, depth[q])
            for j in targets:
                if j == i:
                    continue
                w, hw = ws[j]
                via = graph.mul(q, w)
                hv = depth[q] + hw
                old = out[i].get(j)
                if old is None:
                    fill += 1
                    new, hn = via, hv
                else:
                    new, hn = graph.add(old, via), min(depth[old], hv)
                depth[new] = min(depth.get(new, hn), hn)
                out[i][j] = new
                inn[j][i] = new
        saved.append((d, ins))
        for i in sources:
            del out[i][k]
        for j in targets:
            del inn[j][k]
        out[k].clear()
        inn[k].clear()
    one = graph.const(1)
    x = [None] * n
    hx = [0] * n
    x[order[-1]] = one
    for k, (d, ins) in zip(reversed(order[:-1]), reversed(saved)):
        acc = graph.add(*[q if x[i] == one else graph.mul(x[i], q) for i, q, _ in ins])
        hacc = min(hx[i] + hq for i, _, hq in ins)
        deep1 = max(deep1, hacc)
        x[k] = graph.div(acc, d)
        hx[k] = hacc + 1
        deep0 = max(deep0, hx[k])
    return Reduction(x, pivots, list(order), fill, deep0, deep1)
