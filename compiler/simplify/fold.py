"""Constant folding with exact rationals.

Rows whose operands are all constants become one ``const`` (exact
:class:`fractions.Fraction` arithmetic, so folding never rounds). Within a row
the identities

    x + 0 = x,   x · 1 = x,   x · 0 = 0,   x / 1 = x,   0 / x = 0,
    x / c = x · (1/c),   x − 0 = x,   −(−x) = x,   x^1 = x,   x^0 = 1,
    exp 0 = 1,   log 1 = 0,   max(c₁, c₂, x) = max(max(c₁, c₂), x)

are applied, constant operands of sums and products are combined into one.
``0 / x = 0`` and ``x · 0 = 0`` assume finite x; every node of a steady-state
expression is a finite rate, a sum or a product of them. Folding only removes
operations; it never introduces a subtraction.
"""

from __future__ import annotations

import math
from fractions import Fraction

from ..ir import Function, Graph
from .rewrite import copy_row, nary, rebuild


def _exact_sqrt(v: Fraction):
    if v < 0:
        return None
    n, d = math.isqrt(v.numerator), math.isqrt(v.denominator)
    if n * n == v.numerator and d * d == v.denominator:
        return Fraction(n, d)
    return None


def fold_row(g: Graph, op: str, args: tuple, data) -> int:
    """The folded form of one row whose operands are already folded."""
    ops, dat = g.ops, g.data
    const = [ops[a] == "const" for a in args]
    val = [dat[a] if c else None for a, c in zip(args, const)]
    if op in ("add", "mul"):
        total = Fraction(0 if op == "add" else 1)
        rest = []
        for a, c, v in zip(args, const, val):
            if c:
                total = total + v if op == "add" else total * v
            else:
                rest.append(a)
        if op == "mul" and total == 0:
            return g.const(0)
        neutral = 0 if op == "add" else 1
        if not rest:
            return g.const(total)
        if total != neutral:
            rest.append(g.const(total))
        return nary(g, op, rest)
    if op == "max":
        cs = [v for v in val if v is not None]
        rest = [a for a, c in zip(args, const) if not c]
        if cs:
            rest.append(g.const(max(cs)))
        return nary(g, op, rest)
    if op == "div":
        a, b = args
        if const[1] and val[1] == 1:
            return a
        if const[0] and val[0] == 0 and not (const[1] and val[1] == 0):
            return g.const(0)
        if const[1] and val[1] != 0:
            if const[0]:
                return g.const(val[0] / val[1])
            return fold_row(g, "mul", (a, g.const(1 / val[1])), None)
        return g.node("div", args)
    if op == "sub":
        a, b = args
        if const[1] and val[1] == 0:
            return a
        if a == b:
            return g.const(0)
        if all(const):
            return g.const(val[0] - val[1])
        if const[0] and val[0] == 0:
            return fold_row(g, "neg", (b,), None)
        return g.node("sub", args)
    if op == "neg":
        (a,) = args
        if const[0]:
            return g.const(-val[0])
        if ops[a] == "neg":
            return g.args[a][0]
        return g.node("neg", args)
    if op == "pow":
        a, b = args
        if const[1]:
            e = val[1]
            if e == 1:
                return a
            if e == 0:
                return g.const(1)
            if const[0] and e.denominator == 1 and not (val[0] == 0 and e < 0):
                return g.const(val[0] ** int(e))
        return g.node("pow", args)
    if op == "exp" and const[0] and val[0] == 0:
        return g.const(1)
    if op == "log" and const[0] and val[0] == 1:
        return g.const(0)
    if op == "sqrt" and const[0]:
        root = _exact_sqrt(val[0])
        if root is not None:
            return g.const(root)
    return copy_row(g, op, args, data)


def fold(fn: Function) -> Function:
    """Constant folding and the neutral-element identities (exact Fractions).

    Parameters
    ----------
    fn : Function

    Returns
    -------
    Function
        Equal values; fewer rows wherever a constant could be folded.
    """
    return rebuild(fn, lambda g, i, op, args, data: fold_row(g, op, args, data))
