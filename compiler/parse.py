"""Safe rate-label parser and the TOML model-file loader.

A rate label is arithmetic on numbers and symbols: ``+ - * / **``, parentheses
and the functions ``exp``, ``log`` and ``sqrt``. Nothing else is accepted.
The text is never handed to ``eval`` or ``sympify``: its length and nesting
depth are capped, then :func:`ast.parse` builds a syntax tree whose node types
are checked against a whitelist, and the label is rebuilt as a small tuple tree
(:data:`Label`) that the compiler lowers into its IR.

A model file is data. Loading it reads TOML with :mod:`tomllib` and parses
labels with this module; no code from the file is ever executed.
"""

from __future__ import annotations

import ast
import math
import tomllib
from fractions import Fraction
from pathlib import Path
from typing import TYPE_CHECKING

from .errors import ModelError

if TYPE_CHECKING:
    from .model import Scheme

MAX_LABEL_LENGTH = 2000
MAX_NESTING = 60
FUNCTIONS = ("exp", "log", "sqrt")

# A parsed label is a tuple tree:
#   ("num", Fraction)  ("sym", name)  ("neg", a)  ("exp"|"log"|"sqrt", a)
#   ("add"|"sub"|"mul"|"div"|"pow", a, b)
Label = tuple

_BINOPS = {ast.Add: "add", ast.Sub: "sub", ast.Mult: "mul", ast.Div: "div", ast.Pow: "pow"}


def parse_label(text: str, *, where: str = "rate") -> Label:
    """Parse one rate label into a tuple tree.

    ``where`` names the place (file and edge) for error messages.

    >>> parse_label("k1*c")
    ('mul', ('sym', 'k1'), ('sym', 'c'))
    """
    if not isinstance(text, (str, int, float)) or isinstance(text, bool):
        raise ModelError(f"{where}: rate must be a string or a number, got {type(text).__name__}")
    if isinstance(text, (int, float)):
        return _number(text, where, repr(text))
    source = text.strip()
    if not source:
        raise ModelError(f"{where}: empty rate expression")
    if len(source) > MAX_LABEL_LENGTH:
        raise ModelError(f"{where}: rate expression longer than {MAX_LABEL_LENGTH} characters")
    depth = 0
    for ch in source:
        depth += ch == "("
        depth -= ch == ")"
        if depth > MAX_NESTING:
            raise ModelError(f"{where}: rate expression nested deeper than {MAX_NESTING} parentheses")
    if "__" in source:
        raise ModelError(f"{where}: names with double underscores are not allowed in {source!r}")
    try:
        tree = ast.parse(source, mode="eval")
    except SyntaxError:
        raise ModelError(f"{where}: malformed rate expression {source!r}") from None
    except (RecursionError, MemoryError, ValueError):
        raise ModelError(f"{where}: rate expression {source!r} is too complex to parse") from None
    return _convert(tree.body, where, source, 0)


def _number(value, where: str, source: str) -> Label:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ModelError(f"{where}: only numbers are allowed as constants in {source!r}")
    if isinstance(value, float) and not math.isfinite(value):
        raise ModelError(f"{where}: non-finite number in {source!r}")
    return ("num", Fraction(value))


def _convert(node: ast.AST, where: str, source: str, depth: int) -> Label:
    if depth > 4 * MAX_NESTING:
        raise ModelError(f"{where}: rate expression {source!r} is nested too deeply")
    if isinstance(node, ast.Constant):
        return _number(node.value, where, source)
    if isinstance(node, ast.Name):
        if node.id.startswith("_"):
            raise ModelError(f"{where}: names starting with an underscore are not allowed ({node.id!r})")
        if node.id in FUNCTIONS:
            raise ModelError(f"{where}: function {node.id!r} used without an argument in {source!r}")
        return ("sym", node.id)
    if isinstance(node, ast.BinOp) and type(node.op) in _BINOPS:
        return (_BINOPS[type(node.op)],
                _convert(node.left, where, source, depth + 1),
                _convert(node.right, where, source, depth + 1))
    if isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.USub, ast.UAdd)):
        inner = _convert(node.operand, where, source, depth + 1)
        return ("neg", inner) if isinstance(node.op, ast.USub) else inner
    if isinstance(node, ast.Call):
        func = node.func
        if not isinstance(func, ast.Name) or func.id not in FUNCTIONS:
            shown = ast.get_source_segment(source, func) or type(func).__name__
            raise ModelError(f"{where}: call to {shown!r} is not allowed; only exp, log and sqrt ({source!r})")
        if len(node.args) != 1 or node.keywords:
            raise ModelError(f"{where}: {func.id} takes exactly one argument ({source!r})")
        return (func.id, _convert(node.args[0], where, source, depth + 1))
    shown = ast.get_source_segment(source, node) or type(node).__name__
    raise ModelError(f"{where}: {shown!r} is not arithmetic; allowed are numbers, names, "
                     f"+ - * / ** ( ) and exp, log, sqrt ({source!r})")


def label_symbols(label: Label) -> list[str]:
    """Symbol names in a label, in order of first appearance."""
    seen: dict[str, None] = {}
    stack = [label]
    while stack:
        node = stack.pop()
        if node[0] == "sym":
            seen.setdefault(node[1], None)
        elif node[0] != "num":
            stack.extend(reversed(node[1:]))
    return list(seen)


def label_text(label: Label) -> str:
    """Canonical text of a label (fully parenthesised where needed)."""
    kind = label[0]
    if kind == "num":
        v = label[1]
        return str(v.numerator) if v.denominator == 1 else f"({v.numerator}/{v.denominator})"
    if kind == "sym":
        return label[1]
    if kind == "neg":
        return f"(-{label_text(label[1])})"
    if kind in FUNCTIONS:
        return f"{kind}({label_text(label[1])})"
    sign = {"add": "+", "sub": "-", "mul": "*", "div": "/", "pow": "**"}[kind]
    return f"({label_text(label[1])}{sign}{label_text(label[2])})"


# ---------------------------------------------------------------- model files

_TOP_KEYS = {"name", "description", "parameters", "inputs", "edges", "observables",
             "pairs", "parts", "couplings", "composition"}
_SYMBOL_KEYS = {"value", "min", "max", "description", "unit"}
_EDGE_KEYS = {"source", "target", "rate", "description"}


def load(path) -> "Scheme":
    """Load a TOML model file into a :class:`~treeflux.compiler.model.Scheme`.

    Every refusal is a :class:`ModelError` whose one-line message names the
    file and the offending entry.
    """
    from .model import Scheme

    path = Path(path)
    where = str(path)
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise ModelError(f"{where}: no such model file") from None
    except OSError as exc:
        raise ModelError(f"{where}: cannot read model file ({exc.strerror})") from None
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError:
        raise ModelError(f"{where}: model file is not UTF-8 text") from None
    except tomllib.TOMLDecodeError as exc:
        raise ModelError(f"{where}: not valid TOML ({exc})") from None
    return from_data(data, where=where, default_name=path.stem)


def from_data(data: dict, *, where: str = "scheme", default_name: str = "scheme") -> "Scheme":
    """A Scheme from the tables of a model file already read into dictionaries
    (the same keys as the TOML file: parameters, inputs, edges, pairs, parts,
    couplings, composition, observables). ``where`` names it in errors."""
    from .model import Scheme

    if not isinstance(data, dict):
        raise ModelError(f"{where}: a model description is a table (dict)")
    unknown = set(data) - _TOP_KEYS
    if unknown:
        raise ModelError(f"{where}: unknown top-level key(s) {', '.join(sorted(unknown))}")
    name = data.get("name", default_name)
    if not isinstance(name, str):
        raise ModelError(f"{where}: 'name' must be a string")
    scheme = Scheme(name=name, origin=where)
    for section, adder in (("parameters", scheme.add_parameter), ("inputs", scheme.add_input)):
        table = data.get(section, {})
        if not isinstance(table, dict):
            raise ModelError(f"{where}: [{section}] must be a table")
        for sym, spec in table.items():
            if isinstance(spec, (int, float)) and not isinstance(spec, bool):
                spec = {"value": spec}
            if not isinstance(spec, dict):
                raise ModelError(f"{where}: {section}.{sym} must be a table like {{ value = 1.0 }}")
            bad = set(spec) - _SYMBOL_KEYS
            if bad:
                raise ModelError(f"{where}: {section}.{sym} has unknown key(s) {', '.join(sorted(bad))}")
            adder(sym, value=spec.get("value"), min=spec.get("min"), max=spec.get("max"))
    edges = data.get("edges", [])
    if not isinstance(edges, list):
        raise ModelError(f"{where}: 'edges' must be an array of tables ([[edges]])")
    for i, edge in enumerate(edges, 1):
        if not isinstance(edge, dict):
            raise ModelError(f"{where}: edge {i} must be a table")
        bad = set(edge) - _EDGE_KEYS
        if bad:
            raise ModelError(f"{where}: edge {i} has unknown key(s) {', '.join(sorted(bad))}")
        for key in ("source", "target", "rate"):
            if key not in edge:
                raise ModelError(f"{where}: edge {i} is missing '{key}'")
        scheme.add_edge(edge["source"], edge["target"], edge["rate"])
    from . import compose
    if "pairs" in data:
        compose.add_pairs(scheme, data["pairs"], where)
    composition = None
    if "parts" in data:
        composition = compose.compose(scheme, data, where)
    elif "couplings" in data or "composition" in data:
        raise ModelError(f"{where}: 'couplings' and [composition] need [parts]")
    observables = data.get("observables", {})
    if not isinstance(observables, dict):
        raise ModelError(f"{where}: [observables] must be a table")
    for obs, weights in observables.items():
        if not isinstance(weights, dict):
            raise ModelError(f"{where}: observable {obs!r} must map state names to weights")
        if "parts" in weights:
            if composition is None or len(weights) != 1:
                raise ModelError(f"{where}: observable {obs!r}: {{ parts = ... }} stands alone, "
                                 "in a composed scheme")
            weights = compose.count_weights(composition, weights["parts"], f"{where}: observable {obs!r}")
        scheme.add_observable(obs, weights)
    scheme.validate()
    return scheme
