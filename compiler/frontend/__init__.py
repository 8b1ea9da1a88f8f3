"""Front ends: from a Scheme to the IR.

:func:`build` lowers every distinct label into the IR once, finds the
terminal strongly connected components (the steady states live there, one
basis vector per component; transient states get probability 0), runs the
chosen front end on each component, and normalizes:

- ``trees``: Matrix-Tree sums by enumeration (:mod:`.trees`);
- ``elimination``: symbolic subtraction-free state reduction (:mod:`.elimination`);
- ``equilibrium``: path products under detailed balance (:mod:`.equilibrium`).

The Function it returns has the label nodes in ``labels`` (scheme edge order),
group ``rho`` (unnormalized weights: ρ_i for trees, ρ_i/ρ_root otherwise) and
either group ``p`` (one terminal component) or ``basis`` (n_components ×
n_states, row-major).
"""

from __future__ import annotations

from dataclasses import dataclass, field

from ..ir import Function, Graph, lower_label
from ..model import Scheme
from ..structure import terminal_components
from . import elimination, equilibrium, trees

METHODS = ("trees", "elimination", "equilibrium")


@dataclass
class BuildInfo:
    method: str
    components: list[list[int]]
    fill: int = 0
    orders: list[list[int]] = field(default_factory=list)
    pivots: list[list[int]] = field(default_factory=list)  # IR nodes, elimination only


def lower_labels(scheme: Scheme, graph: Graph) -> list[int]:
    column = {name: j for j, name in enumerate(scheme.symbols)}
    return [lower_label(graph, e.label, column) for e in scheme.edges]


def build(scheme: Scheme, *, method: str, scale: bool = True, order=None) -> tuple[Function, BuildInfo]:
    """Lower ``scheme`` to a Function with the chosen front end (no size checks here).

    ``order`` is an elimination order of all states, for a scheme that is one
    strongly connected component (the planner has already computed it)."""
    if method not in METHODS:
        raise ValueError(f"unknown front end {method!r}")
    scheme.validate()
    g = Graph()
    labels = lower_labels(scheme, g)
    n = len(scheme.states)
    edges = scheme.edge_list()
    comps = terminal_components(n, edges)
    info = BuildInfo(method, comps)
    zero = g.const(0)
    rho_all, p_blocks = [], []
    for comp in comps:
        local = {s: a for a, s in enumerate(comp)}
        sub = [(local[i], local[j]) for (i, j) in edges if i in local and j in local]
        sub_labels = [lab for (i, j), lab in zip(edges, labels) if i in local and j in local]
        if len(comp) == 1:
            x = [g.const(1)]
        elif method == "trees":
            x = trees.tree_sums(g, len(comp), sub, sub_labels, scale=scale)
        elif method == "elimination":
            whole = order is not None and len(comp) == n
            red = elimination.reduce(g, len(comp), sub, sub_labels, order=list(order) if whole else None)
            info.fill += red.fill
            info.orders.append([comp[a] for a in red.order])
            info.pivots.append(red.pivots)
            x = red.x
        else:
            x = equilibrium.path_products(g, len(comp), sub, sub_labels)
        total = g.add(*x)
        rho = [zero] * n
        p = [zero] * n
        for a, s in enumerate(comp):
            rho[s] = x[a]
            p[s] = g.div(x[a], total)
        rho_all.append(rho)
        p_blocks.append(p)
    fn = Function(g, len(scheme.symbols), [], labels=labels)
    if len(comps) == 1:
        fn.add_group("p", p_blocks[0])
        fn.add_group("rho", rho_all[0])
    else:
        fn.add_group("basis", [v for block in p_blocks for v in block])
        fn.add_group("rho", [v for block in rho_all for v in block])
    return fn, info
