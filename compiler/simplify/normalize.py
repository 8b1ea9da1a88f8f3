"""One reciprocal per shared denominator.

Where several quotients share a denominator b, as the steady state
p_i = ρ_i / Σ_j ρ_j does (and the scaled labels ℓ_k / s of the tree form),

    a_1 / b, …, a_n / b   →   r = 1 / b,   a_1 · r, …, a_n · r

trading n divisions for one division and n multiplications (a division costs
several multiplications on current hardware: common practice). The extra
rounding is one ulp per quotient; nothing is subtracted, so entrywise relative
accuracy is kept.
"""

from __future__ import annotations

from collections import Counter

from ..ir import Function, live
from .rewrite import COMMUTATIVE, nary, rebuild, roots_of


def normalize(fn: Function, *, min_shared: int = 2) -> Function:
    """Replace divisions that share a denominator by products with its reciprocal.

    Parameters
    ----------
    fn : Function
    min_shared : int, keyword-only
        How many quotients must share a denominator before it pays (default 2).

    Returns
    -------
    Function
        Equal values; ``div`` rows with a shared denominator become ``mul``.
    """
    old = fn.graph
    one_over = lambda i: old.ops[old.args[i][0]] == "const" and old.data[old.args[i][0]] == 1  # noqa: E731
    shared = Counter(old.args[i][1] for i in live(old, roots_of(fn))
                     if old.ops[i] == "div" and not one_over(i))
    recip: dict[int, int] = {}

    def row(g, i, op, args, data):
        if op == "div" and shared[old.args[i][1]] >= min_shared and not one_over(i):
            b = args[1]
            r = recip.get(b)
            if r is None:
                r = recip[b] = g.node("div", (g.const(1), b))
            return nary(g, "mul", (args[0], r))
        if op in COMMUTATIVE:
            return nary(g, op, args)
        return g.node(op, args, data)

    return rebuild(fn, row)
