"""Shared machinery of the passes: rebuilding a Function row by row.

Every pass reads a :class:`~treeflux.compiler.ir.Function` and writes a new one.
It walks the live rows of the old graph in ascending order (a topological
order, so operands are always mapped before their users) and decides, for
each row, which node of the new graph stands for it. :func:`rebuild` does the
walk; a pass supplies one function per row.

:func:`nary` is the canonical constructor the passes share: operands of the
commutative ops ``add``, ``mul`` and ``max`` are sorted by node id (``max``
also drops repeats, being idempotent), so that once operands are shared,
equal expressions intern to one node.
"""

from __future__ import annotations

from ..ir import Function, Graph, live

COMMUTATIVE = frozenset({"add", "mul", "max"})


def nary(g: Graph, op: str, xs) -> int:
    """Canonical n-ary node: sorted operands; one operand is returned as is."""
    xs = sorted(set(xs)) if op == "max" else sorted(xs)
    if not xs:
        raise ValueError(f"{op} of nothing")
    return xs[0] if len(xs) == 1 else g.node(op, tuple(xs))


def roots_of(fn: Function) -> list[int]:
    return list(fn.outputs) + list(fn.labels)


def use_counts(fn: Function) -> list[int]:
    """How often each row is used: once per operand slot of a live user and once
    per appearance among the outputs and labels. Dead rows count 0."""
    g = fn.graph
    uses = [0] * len(g)
    for i in live(g, roots_of(fn)):
        for a in g.args[i]:
            uses[a] += 1
    for r in roots_of(fn):
        uses[r] += 1
    return uses


def rebuild(fn: Function, row) -> Function:
    """New Function whose rows are made by ``row(new_graph, i, op, mapped_args,
    data) -> new id`` for every live row ``i`` of ``fn`` in ascending order."""
    old = fn.graph
    g = Graph()
    m: dict[int, int] = {}
    for i in live(old, roots_of(fn)):
        op, args, data = old.ops[i], old.args[i], old.data[i]
        m[i] = row(g, i, op, tuple(m[a] for a in args), data)
    return Function(g, fn.n_inputs, [m[o] for o in fn.outputs], dict(fn.groups),
                    [m[l] for l in fn.labels])


def copy_row(g: Graph, op: str, args: tuple, data) -> int:
    """The row as it was, with operands in canonical order for commutative ops."""
    if op in COMMUTATIVE:
        return nary(g, op, args)
    return g.node(op, args, data)


VALUE_GROUPS = ("p", "basis", "obs")


def value_roots(fn: Function, groups=VALUE_GROUPS) -> list[int]:
    """Output nodes of the value groups that are present (p, basis, obs)."""
    return [o for name in groups if name in fn.groups for o in fn.group(name)]
