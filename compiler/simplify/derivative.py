"""Derivatives on the IR: forward and reverse mode, emitted as new rows.

Each row v = op(a_1, …, a_k) has local partials ∂v/∂a_k written as a sign,
factors and divisors (so that a contribution costs one product and at most
one division):

==========  =================================================================
op          ∂v/∂a_k
==========  =================================================================
add         +1 for every operand;  sub: +1, −1;  neg: −1
mul         +Π_{l≠k} a_l (prefix/suffix products for long rows)
div a/b     ∂a: +1/b;   ∂b: −v/b
exp         +v;   log: +1/a;   sqrt: +(1/2)/v
pow a^c     c const: sign(c)·|c|·a^(c−1);  else ∂a: b·a^(b−1), ∂b: v·log a
max         none: treated as a constant (see below)
==========  =================================================================

Forward mode (Griewank & Walther, *Evaluating Derivatives*, 2nd ed., SIAM
2008, ch. 3) carries a tangent per row for one input; reverse mode carries an
adjoint per row for one output (Baur & Strassen, Theoret. Comput. Sci. 22
(1983) 317–330: a gradient costs a small constant times the function). Every
derivative row is interned into the same graph as the values, so partial
products that the values already compute (Π_{l≠k} a_l, v/b) are shared.

**Signs.** Tangents and adjoints are kept as a pair (P, N) of subtraction-free
parts with derivative = P − N. With ``signs="merge"`` a row whose P and N are
both present is collapsed to one ``sub`` before it propagates (fewer rows);
with ``signs="split"`` the parts stay apart to the end, so the only
subtraction is the last one per entry (more rows, no cancellation inside).

**The scale is a constant.** Tree-form labels are divided by s = max(ℓ). Every
ρ_i is homogeneous of degree n−1 in the labels, so p = ρ/Σρ is homogeneous of
degree 0 in the scaled labels ℓ' = ℓ/s: by Euler's theorem
Σ_k ℓ'_k ∂p/∂ℓ'_k = 0, and the path through s contributes
(∂s/∂x)·(−1/s)·Σ_k ℓ'_k ∂p/∂ℓ'_k = 0 exactly. So ``max`` rows get no partials.
This holds for normalized outputs (p, basis, observables); it would be wrong
for an unnormalized ρ, which is why only those groups are differentiated by
default.

**Log derivatives.** ∂out/∂log x_j = x_j ∂out/∂x_j. Forward mode seeds the
tangent of input j with x_j itself. Reverse mode carries *relative adjoints*
r_v = v · ∂out/∂v (natural size: the output itself) with the local log-partials
∂log v/∂log a_k:

==========  =================================================================
op          ∂log v/∂log a_k
==========  =================================================================
add         a_k / v (a weight in [0, 1] for positive sums);  sub: a/v, −b/v
mul         +1 for every operand;  neg: +1;  div a/b: +1, −1
exp         a;   log: 1/v;   sqrt: 1/2;   pow a^c (c const): c
==========  =================================================================

and r at input j is the log derivative itself. A raw adjoint ∂p_i/∂v has the
size p_i/v, which under- or overflows on stiff rates (labels over [1e-100,
1e100]) and then hands back a finite wrong number; a relative adjoint stays
within a small multiple of p_i wherever the values themselves are
representable, so its error is a few ulps of p_i. The plain derivative is the
log derivative divided by x_j (the runtime does that division).
"""

from __future__ import annotations

from fractions import Fraction

from ..ir import Function, Graph, compact, count_ops, live
from .fold import fold_row
from .rewrite import nary


class _Emit:
    """Derivative arithmetic with ``None`` as zero, folded as it is built."""

    def __init__(self, g: Graph):
        self.g = g

    def add(self, xs):
        xs = [x for x in xs if x is not None]
        if not xs:
            return None
        return xs[0] if len(xs) == 1 else fold_row(self.g, "add", tuple(xs), None)

    def scale(self, x, mult, divs):
        """x · Π mult / Π divs (x may be None: zero)."""
        if x is None:
            return None
        g = self.g
        top = fold_row(g, "mul", (x, *mult), None) if mult else x
        if not divs:
            return top
        den = divs[0] if len(divs) == 1 else fold_row(g, "mul", tuple(divs), None)
        return fold_row(g, "div", (top, den), None)

    def combine(self, p, n):
        g = self.g
        if n is None:
            return g.const(0) if p is None else p
        if p is None:
            return fold_row(g, "neg", (n,), None)
        return fold_row(g, "sub", (p, n), None)


def _partials(g: Graph, v: int):
    """[(k, sign, mult, divs)] for every operand slot k of row v (see the table)."""
    op, args = g.ops[v], g.args[v]
    if op in ("add",):
        return [(k, 1, (), ()) for k in range(len(args))]
    if op == "sub":
        return [(0, 1, (), ()), (1, -1, (), ())]
    if op == "neg":
        return [(0, -1, (), ())]
    if op == "mul":
        k = len(args)
        if k == 2:
            return [(0, 1, (args[1],), ()), (1, 1, (args[0],), ())]
        pre, suf = [None] * k, [None] * k
        for i in range(1, k):
            pre[i] = args[0] if i == 1 else nary(g, "mul", (pre[i - 1], args[i - 1]))
        for i in range(k - 2, -1, -1):
            suf[i] = args[k - 1] if i == k - 2 else nary(g, "mul", (suf[i + 1], args[i + 1]))
        return [(i, 1, tuple(x for x in (pre[i], suf[i]) if x is not None), ()) for i in range(k)]
    if op == "div":
        a, b = args
        return [(0, 1, (), (b,)), (1, -1, (v,), (b,))]
    if op == "exp":
        return [(0, 1, (v,), ())]
    if op == "log":
        return [(0, 1, (), (args[0],))]
    if op == "sqrt":
        return [(0, 1, (g.const(Fraction(1, 2)),), (v,))]
    if op == "pow":
        a, b = args
        if g.ops[b] == "const":
            c = g.data[b]
            if c == 0:
                return []
            mult = (g.const(abs(c)),) if c - 1 == 0 else (g.const(abs(c)), g.node("pow", (a, g.const(c - 1))))
            return [(0, 1 if c > 0 else -1, mult, ())]
        bm1 = g.node("sub", (b, g.const(1)))
        return [(0, 1, (b, g.node("pow", (a, bm1))), ()), (1, 1, (v, g.node("log", (a,))), ())]
    return []  # const, input, max (a constant: see the module docstring)


def _log_partials(g: Graph, v: int):
    """[(k, sign, mult, ())] of ∂log v/∂log a_k for every operand slot k (the
    format of :func:`_partials`; ``mult`` holds at most one factor)."""
    op, args = g.ops[v], g.args[v]
    if op == "add":
        return [(k, 1, (g.div(a, v),), ()) for k, a in enumerate(args)]
    if op == "sub":
        return [(0, 1, (g.div(args[0], v),), ()), (1, -1, (g.div(args[1], v),), ())]
    if op in ("neg", "mul"):
        return [(k, 1, (), ()) for k in range(len(args))]
    if op == "div":
        return [(0, 1, (), ()), (1, -1, (), ())]
    if op == "exp":
        return [(0, 1, (args[0],), ())]
    if op == "log":
        return [(0, 1, (g.div(g.const(1), v),), ())]
    if op == "sqrt":
        return [(0, 1, (g.const(Fraction(1, 2)),), ())]
    if op == "pow":
        a, b = args
        if g.ops[b] == "const":
            c = g.data[b]
            return [] if c == 0 else [(0, 1 if c > 0 else -1, (g.const(abs(c)),), ())]
        return [(0, 1, (b,), ()), (1, 1, (g.mul(b, g.log(a)),), ())]
    return []  # const, input, max (a constant: see the module docstring)


def _settle(e: _Emit, pos: list, neg: list, merge: bool):
    p, n = e.add(pos), e.add(neg)
    if merge and p is not None and n is not None:
        return e.combine(p, n), None
    return p, n


def _forward(g: Graph, roots, j: int, seed, merge: bool):
    """Tangents (P, N) of ``roots`` along input j (seeded with node ``seed``)."""
    e = _Emit(g)
    tan: dict[int, tuple] = {}
    for v in live(g, roots):
        op = g.ops[v]
        if op == "input":
            if g.data[v] == j:
                tan[v] = (seed, None)
            continue
        args = g.args[v]
        if not any(a in tan for a in args):
            continue
        pos, neg = [], []
        for k, sign, mult, divs in _partials(g, v):
            t = tan.get(args[k])
            if t is None:
                continue
            tp, tn = e.scale(t[0], mult, divs), e.scale(t[1], mult, divs)
            if sign < 0:
                tp, tn = tn, tp
            if tp is not None:
                pos.append(tp)
            if tn is not None:
                neg.append(tn)
        if pos or neg:
            tan[v] = _settle(e, pos, neg, merge)
    return [tan.get(r, (None, None)) for r in roots]


def _reverse(g: Graph, root: int, n_inputs: int, merge: bool, relative: bool = False):
    """Adjoint parts (P, N) of every input for the output ``root``; with
    ``relative``, relative adjoints r_v = v ∂root/∂v (seeded with root itself),
    so the result at input j is x_j ∂root/∂x_j."""
    e = _Emit(g)
    partials = _log_partials if relative else _partials
    acc: dict[int, tuple[list, list]] = {root: ([root if relative else g.const(1)], [])}
    grad = [(None, None)] * n_inputs
    for v in reversed(live(g, [root])):
        lists = acc.pop(v, None)
        if lists is None:
            continue
        p, n = _settle(e, lists[0], lists[1], merge)
        if p is None and n is None:
            continue
        if g.ops[v] == "input":
            grad[g.data[v]] = (p, n)
            continue
        args = g.args[v]
        for k, sign, mult, divs in partials(g, v):
            cp, cn = e.scale(p, mult, divs), e.scale(n, mult, divs)
            if sign < 0:
                cp, cn = cn, cp
            slot = acc.setdefault(args[k], ([], []))
            if cp is not None:
                slot[0].append(cp)
            if cn is not None:
                slot[1].append(cn)
    return grad


def _check_group(fn: Function, group: str):
    if group not in fn.groups:
        raise ValueError(f"no output group {group!r} to differentiate; groups are {sorted(fn.groups)}")


def _jacobian_nodes(g: Graph, outs, n_inputs, wrt, log, mode, merge):
    e = _Emit(g)
    rows = [[None] * len(wrt) for _ in outs]
    if mode == "forward":
        for c, j in enumerate(wrt):
            seed = g.input(j) if log else g.const(1)
            for r, (p, n) in enumerate(_forward(g, outs, j, seed, merge)):
                rows[r][c] = e.combine(p, n)
    elif mode == "relative":
        for r, out in enumerate(outs):
            grad = _reverse(g, out, n_inputs, merge, relative=True)
            for c, j in enumerate(wrt):
                rows[r][c] = e.combine(*grad[j])
    else:
        for r, out in enumerate(outs):
            grad = _reverse(g, out, n_inputs, merge)
            for c, j in enumerate(wrt):
                p, n = grad[j]
                if log:
                    x = g.input(j)
                    p, n = e.scale(p, (x,), ()), e.scale(n, (x,), ())
                rows[r][c] = e.combine(p, n)
    return [x for row in rows for x in row]


def differentiate(fn: Function, *, group: str = "p", wrt=None, log: bool = False,
                  mode: str = "auto", signs: str = "merge", name: str | None = None) -> Function:
    """Add the Jacobian of an output group as a new group.

    Parameters
    ----------
    fn : Function
        Not modified; the result holds a copy of its graph plus derivative rows.
    group : str, keyword-only
        Output group to differentiate (``p``, ``basis``, ``obs``...).
    wrt : sequence of int, optional, keyword-only
        Input columns (symbols); default all, in order.
    log : bool, keyword-only
        Derivatives with respect to log x_j: x_j ∂out_i/∂x_j.
    mode : {"auto", "forward", "reverse", "relative"}, keyword-only
        Forward costs a sweep per input, reverse a sweep per output. ``auto``
        builds both and keeps the one with fewer operations (by count);
        with ``log`` it is ``relative`` (reverse mode on relative adjoints,
        accurate on stiff rates; see the module docstring).
    signs : {"merge", "split"}, keyword-only
        See the module docstring.
    name : str, optional, keyword-only
        Name of the new group: default ``jac`` for ``p``/``basis``, else
        ``<group>_jac``.

    Returns
    -------
    Function
        With group ``name`` of len(group) × len(wrt) nodes, row-major:
        entry (i, j) = ∂out_i/∂x_{wrt[j]}.
    """
    _check_group(fn, group)
    if mode not in ("auto", "forward", "reverse", "relative"):
        raise ValueError(f"unknown differentiation mode {mode!r}; use auto, forward, reverse or relative")
    if mode == "relative" and not log:
        raise ValueError("relative adjoints give log derivatives: pass log=True")
    if signs not in ("merge", "split"):
        raise ValueError(f"unknown signs option {signs!r}; use merge or split")
    wrt = list(range(fn.n_inputs)) if wrt is None else [int(j) for j in wrt]
    bad = [j for j in wrt if not 0 <= j < fn.n_inputs]
    if bad:
        raise ValueError(f"wrt column {bad[0]} out of range 0..{fn.n_inputs - 1}")
    name = name or ("jac" if group in ("p", "basis") else f"{group}_jac")
    if name in fn.groups:
        raise ValueError(f"output group {name!r} already exists")
    modes = (("relative",) if log else ("forward", "reverse")) if mode == "auto" else (mode,)
    best = None
    for m in modes:
        out = compact(fn)
        nodes = _jacobian_nodes(out.graph, out.group(group), out.n_inputs, wrt, log, m, signs == "merge")
        out.add_group(name, nodes)
        cost = count_ops(out.graph, out.outputs)["total"]
        if best is None or cost < best[0]:
            best = (cost, out)
    return compact(best[1])


def input_derivatives(fn: Function, *, input: int, order: int = 2, group: str = "p",
                      signs: str = "merge") -> Function:
    """Add derivatives of every output of ``group`` along one input, up to ``order``.

    For response curves f(c): groups ``d1`` = ∂out/∂c, ``d2`` = ∂²out/∂c², …
    (forward mode, applied again to the rows of the previous order). If the
    Function has observables (group ``obs``) and ``group`` is not ``obs``,
    groups ``obs_d1``, ``obs_d2``, … hold theirs too.

    Parameters
    ----------
    fn : Function
    input : int, keyword-only
        The input column c.
    order : int, keyword-only
        Highest derivative order (≥ 1), default 2.
    group : str, keyword-only
        Output group, default ``p``.
    signs : {"merge", "split"}, keyword-only

    Returns
    -------
    Function
    """
    _check_group(fn, group)
    if not isinstance(input, int) or not 0 <= input < fn.n_inputs:
        raise ValueError(f"input column {input!r} out of range 0..{fn.n_inputs - 1}")
    if not isinstance(order, int) or order < 1:
        raise ValueError(f"derivative order must be an integer ≥ 1, got {order!r}")
    out = compact(fn)
    g = out.graph
    e = _Emit(g)
    sets = [(group, "d")]
    if "obs" in out.groups and group != "obs":
        sets.append(("obs", "obs_d"))
    merge = signs == "merge"
    for src, prefix in sets:
        current = out.group(src)
        for k in range(1, order + 1):
            tangents = _forward(g, current, input, g.const(1), merge)
            current = [e.combine(p, n) for p, n in tangents]
            out.add_group(f"{prefix}{k}", current)
    return compact(out)
