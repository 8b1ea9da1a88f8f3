"""The treeflux IR: one hash-consed expression DAG in flat arrays.

Every node is a row ``(op, args, data)`` in three parallel lists of a
:class:`Graph`; a node is named by its row number. Construction goes through
:meth:`Graph.node`, which interns: asking twice for the same row returns the
same number, so structural equality is identity. Operands always have smaller
numbers than the node using them, so row order is a topological order and the
graph is at the same time a flat SSA program.

Constructors never simplify: ``add(x, 0)`` is an ``add`` node. Folding,
factoring, canonical operand order and CSE are named passes in
:mod:`treeflux.compiler.simplify`.

Ops (``data`` in brackets):

============  =========  ====================================================
op            arity      meaning
============  =========  ====================================================
``const``     0          [Fraction] exact rational constant
``input``     0          [int] column j of the input row (symbol j)
``add``       n ≥ 2      sum
``mul``       n ≥ 2      product
``div``       2          a / b
``sub``       2          a − b (only inside user labels and derivatives)
``neg``       1          −a (only inside user labels and derivatives)
``pow``       2          a ** b
``exp``       1          e ** a
``log``       1          natural logarithm
``sqrt``      1          square root
``max``       n ≥ 2      largest operand (only as a scale factor: see below)
============  =========  ====================================================

``max`` appears only as the homogeneity scale of tree sums (labels are divided
by the largest label of the row). Normalized probabilities do not depend on
that scale at all, so derivative passes treat it as a constant.

A :class:`Function` is what front ends hand on: a graph, the number of inputs
and the output nodes in groups (``p``: the steady state, ``obs``: observables,
``jac``: derivatives ...). Back ends receive a compacted Function whose rows
are all live, in order, and emit one statement per row.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from fractions import Fraction

OPS = ("const", "input", "add", "mul", "div", "sub", "neg", "pow", "exp", "log", "sqrt", "max")
NARY = frozenset({"add", "mul", "max"})
UNARY = frozenset({"neg", "exp", "log", "sqrt"})
BINARY = frozenset({"div", "sub", "pow"})
SUBTRACTIVE = frozenset({"sub", "neg"})


class Graph:
    """Hash-consed DAG. Rows are (op, args, data); see the module docstring."""

    __slots__ = ("ops", "args", "data", "_intern")

    def __init__(self):
        self.ops: list[str] = []
        self.args: list[tuple[int, ...]] = []
        self.data: list = []
        self._intern: dict = {}

    def __len__(self) -> int:
        return len(self.ops)

    def node(self, op: str, args: tuple[int, ...] = (), data=None) -> int:
        key = (op, args, data)
        found = self._intern.get(key)
        if found is not None:
            return found
        nid = len(self.ops)
        self.ops.append(op)
        self.args.append(args)
        self.data.append(data)
        self._intern[key] = nid
        return nid

    # constructors: thin, never simplifying
    def const(self, value) -> int:
        if isinstance(value, float):
            if not math.isfinite(value):
                raise ValueError(f"non-finite constant {value!r}")
        return self.node("const", (), Fraction(value))

    def input(self, j: int) -> int:
        return self.node("input", (), int(j))

    def _nary(self, op: str, xs) -> int:
        xs = tuple(xs)
        if not xs:
            raise ValueError(f"{op} of nothing")
        return xs[0] if len(xs) == 1 else self.node(op, xs)

    def add(self, *xs) -> int:
        return self._nary("add", xs)

    def mul(self, *xs) -> int:
        return self._nary("mul", xs)

    def max(self, *xs) -> int:
        return self._nary("max", xs)

    def div(self, a: int, b: int) -> int:
        return self.node("div", (a, b))

    def sub(self, a: int, b: int) -> int:
        return self.node("sub", (a, b))

    def neg(self, a: int) -> int:
        return self.node("neg", (a,))

    def pow(self, a: int, b: int) -> int:
        return self.node("pow", (a, b))

    def exp(self, a: int) -> int:
        return self.node("exp", (a,))

    def log(self, a: int) -> int:
        return self.node("log", (a,))

    def sqrt(self, a: int) -> int:
        return self.node("sqrt", (a,))

    def row(self, nid: int):
        return self.ops[nid], self.args[nid], self.data[nid]

    def show(self, nid: int) -> str:
        op, args, data = self.row(nid)
        if op == "const":
            return f"%{nid} = const {data}"
        if op == "input":
            return f"%{nid} = input {data}"
        return f"%{nid} = {op} " + ", ".join(f"%{a}" for a in args)


@dataclass
class Function:
    """A graph with its outputs: the hand-off between every stage.

    ``groups`` maps a group name to (start, stop) in ``outputs``; ``labels``
    are the nodes of the edge labels in scheme edge order (leaves of the
    scheme arithmetic: what lies above them must be subtraction-free).
    """

    graph: Graph
    n_inputs: int
    outputs: list[int]
    groups: dict[str, tuple[int, int]] = field(default_factory=dict)
    labels: list[int] = field(default_factory=list)

    def group(self, name: str) -> list[int]:
        a, b = self.groups[name]
        return self.outputs[a:b]

    def add_group(self, name: str, nodes) -> None:
        start = len(self.outputs)
        self.outputs.extend(nodes)
        self.groups[name] = (start, len(self.outputs))


# ------------------------------------------------------------------ traversal

def live(graph: Graph, roots) -> list[int]:
    """Node ids reachable from ``roots``, ascending (a topological order)."""
    mark = bytearray(len(graph))
    stack = list(roots)
    args = graph.args
    while stack:
        n = stack.pop()
        if not mark[n]:
            mark[n] = 1
            stack.extend(args[n])
    return [i for i in range(len(graph)) if mark[i]]


def compact(fn: Function) -> Function:
    """Dead-node removal: a new Function holding only live rows, renumbered in order."""
    keep = live(fn.graph, list(fn.outputs) + list(fn.labels))
    g = Graph()
    new: dict[int, int] = {}
    for i in keep:
        op, args, data = fn.graph.row(i)
        new[i] = g.node(op, tuple(new[a] for a in args), data)
    return Function(g, fn.n_inputs, [new[o] for o in fn.outputs], dict(fn.groups),
                    [new[l] for l in fn.labels])


def copy_into(src: Graph, dst: Graph, roots, memo=None) -> dict[int, int]:
    """Copy the nodes under ``roots`` from ``src`` into ``dst``; returns the id map."""
    memo = {} if memo is None else memo
    for i in live(src, roots):
        if i not in memo:
            op, args, data = src.row(i)
            memo[i] = dst.node(op, tuple(memo[a] for a in args), data)
    return memo


def verify(fn: Function) -> None:
    """Check the invariants of the IR; an error shows the rows around the fault."""
    g = fn.graph

    def fail(i, msg):
        lo, hi = max(0, i - 3), min(len(g), i + 3)
        near = "\n".join(("> " if j == i else "  ") + g.show(j) for j in range(lo, hi))
        raise AssertionError(f"IR row {i}: {msg}\n{near}")

    for i, (op, args, data) in enumerate(zip(g.ops, g.args, g.data)):
        if op not in OPS:
            fail(i, f"unknown op {op!r}")
        if any(not (0 <= a < i) for a in args):
            fail(i, "operand not defined before use")
        if op == "const" and (args or not isinstance(data, Fraction)):
            fail(i, "const must be a leaf with a Fraction")
        if op == "input" and (args or not isinstance(data, int) or not 0 <= data < fn.n_inputs):
            fail(i, "input must be a leaf with a column in range")
        if op in NARY and len(args) < 2:
            fail(i, f"{op} needs two or more operands")
        if op in UNARY and len(args) != 1:
            fail(i, f"{op} takes one operand")
        if op in BINARY and len(args) != 2:
            fail(i, f"{op} takes two operands")
    for o in list(fn.outputs) + list(fn.labels):
        if not 0 <= o < len(g):
            raise AssertionError(f"output {o} is not a row of the graph")
    for name, (a, b) in fn.groups.items():
        if not 0 <= a <= b <= len(fn.outputs):
            raise AssertionError(f"group {name!r} out of range")


def subtractive_nodes(fn: Function, groups=("p",)) -> list[int]:
    """Rows with a subtraction that lie above the labels (should be none).

    Subtractions inside a label are the user's arithmetic and are ignored."""
    inside = set(live(fn.graph, fn.labels))
    roots = [o for name in groups if name in fn.groups for o in fn.group(name)]
    return [i for i in live(fn.graph, roots)
            if fn.graph.ops[i] in SUBTRACTIVE and i not in inside]


def count_ops(graph: Graph, roots) -> dict[str, int]:
    """Arithmetic operations needed to evaluate ``roots`` once (a DAG count:
    every live row once; an n-ary add is n−1 additions)."""
    counts = {"add": 0, "mul": 0, "div": 0, "special": 0}
    for i in live(graph, roots):
        op, args = graph.ops[i], graph.args[i]
        if op in ("add", "sub"):
            counts["add"] += max(1, len(args) - 1)
        elif op == "mul":
            counts["mul"] += len(args) - 1
        elif op == "div":
            counts["div"] += 1
        elif op in ("pow", "exp", "log", "sqrt"):
            counts["special"] += 1
        elif op == "max":
            counts["add"] += len(args) - 1  # comparisons, costed like additions
    counts["total"] = counts["add"] + counts["mul"] + counts["div"] + counts["special"]
    return counts


# ------------------------------------------------------------------ labels

def lower_label(graph: Graph, label, column: dict[str, int]) -> int:
    """Lower a parsed label (tuple tree from :mod:`parse`) into the graph."""
    kind = label[0]
    if kind == "num":
        return graph.const(label[1])
    if kind == "sym":
        return graph.input(column[label[1]])
    kids = [lower_label(graph, k, column) for k in label[1:]]
    return getattr(graph, kind)(*kids)


# ------------------------------------------------------------------ evaluation

def _fraction_pow(a, b):
    if b.denominator == 1:
        return a ** int(b)
    raise ValueError("exact evaluation of a non-integer power")


class Domain:
    """An op table over one kind of number; :func:`evaluate` runs any of them."""

    def __init__(self, const, add, mul, div, sub, neg, pow, exp, log, sqrt, max, input=None):
        self.table = dict(const=const, add=add, mul=mul, div=div, sub=sub, neg=neg,
                          pow=pow, exp=exp, log=log, sqrt=sqrt, max=max, input=input)


def _sum(xs):
    total = xs[0]
    for x in xs[1:]:
        total = total + x
    return total


def _prod(xs):
    total = xs[0]
    for x in xs[1:]:
        total = total * x
    return total


EXACT = Domain(const=lambda v: v, add=_sum, mul=_prod, div=lambda a, b: a / b,
               sub=lambda a, b: a - b, neg=lambda a: -a, pow=_fraction_pow,
               exp=None, log=None, sqrt=None, max=max)


def mpmath_domain(dps: int = 50) -> Domain:
    import mpmath
    mp = mpmath.MPContext()
    mp.dps = dps
    mpf = mp.mpf
    return Domain(input=lambda v: mpf(v) if not isinstance(v, Fraction) else mpf(v.numerator) / v.denominator,
                  const=lambda v: mpf(v.numerator) / v.denominator, add=_sum, mul=_prod,
                  div=lambda a, b: a / b, sub=lambda a, b: a - b, neg=lambda a: -a,
                  pow=lambda a, b: a ** b, exp=mp.exp, log=mp.log, sqrt=mp.sqrt, max=max)


def _numpy_domain():
    import numpy as np
    return Domain(const=float, add=_sum, mul=_prod, div=np.divide, sub=np.subtract,
                  neg=np.negative, pow=np.power, exp=np.exp, log=np.log, sqrt=np.sqrt,
                  max=lambda xs: np.maximum.reduce(np.broadcast_arrays(*xs)))


def evaluate(fn_or_graph, roots, inputs, domain: Domain | str = "exact") -> list:
    """Evaluate nodes ``roots`` given the input values, in a number domain.

    ``domain`` is ``"exact"`` (Fractions; inputs must be rationals),
    ``"mpmath"`` (50 digits), ``"numpy"`` (float64 arrays, vectorised) or a
    :class:`Domain`. This is the living definition of every op: back ends are
    tested against it.
    """
    graph = fn_or_graph.graph if isinstance(fn_or_graph, Function) else fn_or_graph
    if isinstance(domain, str):
        domain = {"exact": EXACT, "mpmath": None, "numpy": None}[domain] or (
            mpmath_domain() if domain == "mpmath" else _numpy_domain())
    t = domain.table
    convert = t.get("input")
    values: dict[int, object] = {}
    for i in live(graph, roots):
        op, args, data = graph.ops[i], graph.args[i], graph.data[i]
        if op == "const":
            values[i] = t["const"](data)
        elif op == "input":
            values[i] = convert(inputs[data]) if convert else inputs[data]
        elif op in NARY:
            values[i] = t[op]([values[a] for a in args])
        else:
            values[i] = t[op](*[values[a] for a in args])
    return [values[r] for r in roots]


def to_sympy(graph: Graph, roots, symbols) -> list:
    """SymPy expressions of ``roots``; ``symbols`` are the names of the inputs."""
    import sympy
    syms = [sympy.Symbol(s, positive=True) for s in symbols]
    table = Domain(const=lambda v: sympy.Rational(v.numerator, v.denominator),
                   add=lambda xs: sympy.Add(*xs), mul=lambda xs: sympy.Mul(*xs),
                   div=lambda a, b: a / b, sub=lambda a, b: a - b, neg=lambda a: -a,
                   pow=lambda a, b: a ** b, exp=sympy.exp, log=sympy.log,
                   sqrt=sympy.sqrt, max=lambda xs: sympy.Max(*xs))
    return evaluate(graph, roots, syms, table)
