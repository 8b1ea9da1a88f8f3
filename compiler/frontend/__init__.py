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
    guard: dict = field(default_factory=dict)  # the range test folded into p (see guard_factor)


def rates_may_be_negative(scheme: Scheme) -> bool:
    """True when some label can evaluate negative for allowed symbol values:
    a subtraction or negation outside ``exp``, a logarithm, a signed symbol
    (declared min < 0), a negative constant, or a power or square root of
    something that may be negative. Such models have their rates checked row
    by row at evaluation; otherwise a rate is positive, zero (an absent edge)
    or non-finite, and the kernel's own checks see it."""
    signed = {s.name for s in scheme.parameters + scheme.inputs if s.min is not None and s.min < 0}

    def maybe_negative(label) -> bool:
        kind = label[0]
        if kind == "num":
            return label[1] < 0
        if kind == "sym":
            return label[1] in signed
        if kind == "exp":
            return False                  # exp of anything is positive (or overflows: caught)
        if kind in ("sub", "neg", "log"):
            return True
        if kind == "pow":
            return maybe_negative(label[1])
        return any(maybe_negative(k) for k in label[1:])

    return any(maybe_negative(e.label) for e in scheme.edges)


def lower_labels(scheme: Scheme, graph: Graph) -> list[int]:
    column = {name: j for j, name in enumerate(scheme.symbols)}
    return [lower_label(graph, e.label, column) for e in scheme.edges]


# Every value of a straight-line steady state must stay above 2^-EXPONENT_BUDGET
# (well inside the normal float64 range, 2^-1022) for its digits to be safe.
EXPONENT_BUDGET = 960
# The guard factor is raised to 2^AMPLIFY: a factor 1 + ε becomes 1 + 4096ε,
# which the row-sum test sees (see CompiledModel).
AMPLIFY = 12


def guard_factor(g: Graph, labels: list[int], bounds) -> tuple[int | None, dict]:
    """An IR node that is exactly 1 when a set's labels lie in the range where
    the straight-line formulas cannot underflow, and > 1 (or inf, NaN)
    otherwise; the normalizer of p is multiplied by it, so a set outside the
    range fails the run-time row-sum test and goes to the looped path.

    ``bounds`` holds (depth0, depth1, out_degree) per component: with
    lo, hi the smallest and largest label and R = out_degree·hi/lo, every
    scale-free value is ≥ R^-depth0 and every rate-like value is
    ≥ lo·R^-depth1 (trees: products of n−1 labels scaled by hi; equilibrium:
    products of n−1 ratios; elimination: depths counted by
    :func:`.elimination.reduce`). The test is R ≤ 2^a and lo ≥ 2^(−960 +
    depth1·a) with a = min(960/depth0, 480/depth1): one max over the labels,
    one over their negations (an exact sign flip, not a subtraction), two
    divisions and AMPLIFY squarings per set. Derivatives see a constant
    (``max`` has no partials), so gradients are unchanged."""
    from fractions import Fraction

    live = [b for b in bounds if b[0] > 0]
    if not labels or not live:
        return None, {}
    a = min(min(EXPONENT_BUDGET // d0 for d0, _, _ in live),
            min((EXPONENT_BUDGET // 2) // d1 for _, d1, _ in live if d1 > 0) if any(d1 for _, d1, _ in live)
            else EXPONENT_BUDGET)
    degree = max(deg for _, _, deg in live)
    spread_exp = max(a - max(degree - 1, 0).bit_length(), 0)
    floor_exp = -EXPONENT_BUDGET + max(d1 for _, d1, _ in live) * a
    minus = g.const(-1)
    hi = g.max(*labels)
    lo = g.mul(g.max(*[g.mul(lab, minus) for lab in labels]), minus)
    lo_scaled = g.mul(lo, g.const(Fraction(2) ** spread_exp))
    factor = g.div(g.max(hi, lo_scaled), lo_scaled)
    if any(d1 for _, d1, _ in live):
        factor = g.mul(factor, g.div(g.max(lo, g.const(Fraction(2) ** floor_exp)), lo))
    for _ in range(AMPLIFY):
        factor = g.mul(factor, factor)
    return factor, {"max_label_ratio": f"2^{spread_exp}", "min_label": f"2^{floor_exp}"}


def build(scheme: Scheme, *, method: str, scale: bool = True, order=None,
          guard: bool = False) -> tuple[Function, BuildInfo]:
    """Lower ``scheme`` to a Function with the chosen front end (no size checks here).

    ``order`` is an elimination order of all states, for a scheme that is one
    strongly connected component (the planner has already computed it).
    ``guard`` folds the run-time range test (:func:`guard_factor`) into the
    normaliser of p: compiled kernels want it; symbolic uses do not."""
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
    rho_all, x_blocks = [], []
    bounds = []
    for comp in comps:
        local = {s: a for a, s in enumerate(comp)}
        sub = [(local[i], local[j]) for (i, j) in edges if i in local and j in local]
        sub_labels = [lab for (i, j), lab in zip(edges, labels) if i in local and j in local]
        if len(comp) == 1:
            x = [g.const(1)]
        elif method == "trees":
            x = trees.tree_sums(g, len(comp), sub, sub_labels, scale=scale)
            bounds.append((len(comp) - 1, 0, 1))
        elif method == "elimination":
            whole = order is not None and len(comp) == n
            red = elimination.reduce(g, len(comp), sub, sub_labels, order=list(order) if whole else None)
            info.fill += red.fill
            info.orders.append([comp[a] for a in red.order])
            info.pivots.append(red.pivots)
            x = red.x
            out_degree = max(sum(1 for (i, _) in sub if i == a) for a in range(len(comp)))
            bounds.append((red.depth0, red.depth1, out_degree))
        else:
            x = equilibrium.path_products(g, len(comp), sub, sub_labels)
            bounds.append((len(comp) - 1, 0, 1))
        rho = [zero] * n
        for a, s in enumerate(comp):
            rho[s] = x[a]
        rho_all.append(rho)
        x_blocks.append((comp, x))
    guard, info.guard = guard_factor(g, labels, bounds) if guard else (None, {})
    p_blocks = []
    for comp, x in x_blocks:
        total = g.mul(g.add(*x), guard) if guard is not None else g.add(*x)
        p = [zero] * n
        for a, s in enumerate(comp):
            p[s] = g.div(x[a], total)
        p_blocks.append(p)
    fn = Function(g, len(scheme.symbols), [], labels=labels)
    if len(comps) == 1:
        fn.add_group("p", p_blocks[0])
        fn.add_group("rho", rho_all[0])
    else:
        fn.add_group("basis", [v for block in p_blocks for v in block])
        fn.add_group("rho", [v for block in rho_all for v in block])
    return fn, info
