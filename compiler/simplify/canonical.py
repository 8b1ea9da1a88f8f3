"""Canonical form: flattened sums and products, sorted operands.

Two rewrites, applied row by row in topological order:

- **flattening**: an ``add`` operand of an ``add`` (a ``mul`` operand of a
  ``mul``) is spliced into its user, ``add(add(a, b), c) → add(a, b, c)``,
  when the inner node has no other user. A shared inner node is kept as an
  operand: splicing it into each user would repeat its additions, and keeping
  it is exactly the sharing CSE is after.
- **ordering**: operands of the commutative ops (``add``, ``mul``, ``max``)
  are sorted by node id; ``max`` drops repeated operands (it is idempotent).

Because the graph interns rows, two structurally equal subexpressions reach
the same operands in the same order and so become one node: this pass is
also common-subexpression elimination (hash-consing does the work).
Associativity and commutativity are exact in the rationals; in floating point
the rounding of a reordered sum changes by a few ulps, with the same sign
pattern, so subtraction-freeness and relative accuracy are untouched.
"""

from __future__ import annotations

from ..ir import Function
from .rewrite import COMMUTATIVE, nary, rebuild, use_counts


def canonical(fn: Function) -> Function:
    """Flatten unshared nested add/mul, sort commutative operands, share equal nodes.

    Parameters
    ----------
    fn : Function
        Any Function; it is not modified.

    Returns
    -------
    Function
        The same values, in canonical form (dead rows may remain: see
        :func:`treeflux.compiler.ir.compact`).
    """
    old = fn.graph
    uses = use_counts(fn)
    flat: dict[int, tuple[int, ...]] = {}   # old id → its flattened operands (new ids)

    def row(g, i, op, args, data):
        if op not in COMMUTATIVE:
            return g.node(op, args, data)
        if op == "max":
            return nary(g, op, args)
        operands: list[int] = []
        for a_old, a_new in zip(old.args[i], args):
            if old.ops[a_old] == op and uses[a_old] == 1 and a_old in flat:
                operands.extend(flat[a_old])
            else:
                operands.append(a_new)
        flat[i] = tuple(operands)
        return nary(g, op, operands)

    return rebuild(fn, row)
