"""Safe rate-label parser and the TOML model-file loader.

A rate label is arithmetic on numbers and symbols: ``+ - * / **``, parentheses
and the functions ``exp``, ``log`` and ``sqrt``. Nothing else is accepted.
The text is never handed to ``eval`` or ``sympify``: its characters are
checked (no look-alike, invisible or control characters), its length and
nesting depth are capped, then :func:`ast.parse` builds a syntax tree whose
node types are checked against a whitelist, and the label is rebuilt as a
small tuple tree (:data:`Label`) that the compiler lowers into its IR.

Every constant subexpression is evaluated once at parse time with bounded
exact arithmetic (:func:`constant_value`): a constant that is not finite, or
whose magnitude lies outside [1e-300, 1e300], or whose exact rational would
need more than :data:`MAX_CONSTANT_BITS` bits, is refused before any work
(``9**9**9``, ``10**400``, ``1/0``, ``0**-1``), so no later stage can hang or
overflow folding it.

Text rules (names and rates): every character must be printable and equal to
its own NFKC normal form, so nothing can hide (zero-width characters,
bidirectional controls, terminal escapes) and nothing can silently fold into
another name (fullwidth ``ｋ`` reads as ``k`` in Python identifiers).
Non-ASCII letters (Greek ``α``, accented letters in composed form) are
allowed in symbol names; other non-ASCII characters are allowed only in
state, observable and model names.

A model file is data. Loading it reads TOML with :mod:`tomllib` and parses
labels with this module; no code from the file is ever executed.
"""

from __future__ import annotations

import ast
import keyword
import math
import stat
import tomllib
import unicodedata
import warnings
from fractions import Fraction
from pathlib import Path
from typing import TYPE_CHECKING

from .errors import ModelError

if TYPE_CHECKING:
    from .model import Scheme

MAX_LABEL_LENGTH = 2000
MAX_NESTING = 60            # parentheses
MAX_DEPTH = 4 * MAX_NESTING  # nested operations (long chains count logarithmically)
SHORT_CHAIN = 16            # longer chains of + - or * become balanced binary trees
MAX_NAME_LENGTH = 200
MAX_CONSTANT_BITS = 4096    # numerator or denominator of a folded constant
MAX_MODEL_FILE_BYTES = 128 * 2**20
CONSTANT_RANGE = (Fraction(1, 10**300), Fraction(10**300))
FUNCTIONS = ("exp", "log", "sqrt")

# A parsed label is a tuple tree:
#   ("num", Fraction)  ("sym", name)  ("neg", a)  ("exp"|"log"|"sqrt", a)
#   ("add"|"sub"|"mul"|"div"|"pow", a, b)
# Every operation is binary. A chain longer than SHORT_CHAIN terms
# (k1 + k2 + ... + k500) is a balanced tree instead of Python's left-deep one.
Label = tuple

_BINOPS = {ast.Add: "add", ast.Sub: "sub", ast.Mult: "mul", ast.Div: "div", ast.Pow: "pow"}


# ---------------------------------------------------------------- text checks

def safe_text(text) -> str:
    """``text`` with every non-printable character escaped, so that a message
    embedding it stays one line and cannot drive the terminal."""
    text = str(text)
    if text.isprintable():
        return text
    return "".join(ch if ch.isprintable() else ascii(ch)[1:-1] for ch in text)


def _char_name(ch: str) -> str:
    name = unicodedata.name(ch, None)
    if name is None:
        name = {"Cc": "control character", "Cs": "surrogate", "Co": "private use",
                "Cn": "unassigned"}.get(unicodedata.category(ch), "unnamed")
    return f"U+{ord(ch):04X} {name}"


def _text_fault(text: str, *, letters_only: bool, allow_newlines: bool = False) -> str | None:
    """The first character that makes ``text`` unsafe, described, or None.

    ``letters_only``: non-ASCII characters must be letters (rates, symbols).
    ``allow_newlines``: tab, CR and LF pass (whitespace inside a rate)."""
    for pos, ch in enumerate(text, 1):
        if " " <= ch <= "~" or (allow_newlines and ch in "\t\r\n"):
            continue
        where = f"character {_char_name(ch)} at position {pos}"
        cat = unicodedata.category(ch)
        if cat == "Cc":
            return f"{where}: control characters are not allowed"
        if cat in ("Cf", "Zl", "Zp"):
            return f"{where}: invisible formatting characters are not allowed"
        if cat in ("Cs", "Co", "Cn"):
            return f"{where}: not an assigned printable character"
        folded = unicodedata.normalize("NFKC", ch)
        if folded != ch:
            return (f"{where} is a look-alike of {folded!r} (Unicode NFKC folds it); "
                    "write the plain character")
        if cat.startswith("Z"):
            return f"{where}: only the plain space is allowed as a space"
        if letters_only and not cat.startswith("L"):
            return f"{where}: only ASCII and letters are allowed here"
    if unicodedata.normalize("NFKC", text) != text:
        pos, ch = next((p, c) for p, c in enumerate(text, 1)
                       if unicodedata.category(c).startswith("M") or p == len(text))
        return (f"character {_char_name(ch)} at position {pos} combines with its neighbour "
                "(Unicode NFKC changes the text); write the composed character")
    return None


def check_name(name, what: str, where: str, *, symbol: bool = False) -> str:
    """Refuse a name that is empty, too long, or could hide or fold text.

    Symbol names must also be usable in a rate: an identifier (ASCII letters,
    digits, underscores, non-ASCII letters), not a keyword or function name,
    not starting with an underscore."""
    if not isinstance(name, str) or not name.strip():
        shown = repr(name) if isinstance(name, str) else type(name).__name__
        raise ModelError(f"{where}: {what} name must be a non-empty string, got {shown}")
    if len(name) > MAX_NAME_LENGTH:
        raise ModelError(f"{where}: {what} name {name[:40]!r}... is longer than "
                         f"{MAX_NAME_LENGTH} characters")
    fault = _text_fault(name, letters_only=symbol)
    if fault:
        raise ModelError(f"{where}: {what} name {name!r}: {fault}")
    if name != name.strip():
        raise ModelError(f"{where}: {what} name {name!r} has leading or trailing spaces")
    if name.startswith("_"):
        raise ModelError(f"{where}: {what} name {name!r} must not start with an underscore")
    if symbol:
        if not name.isidentifier() or keyword.iskeyword(name):
            raise ModelError(f"{where}: {what} name {name!r} cannot be used in a rate; use letters, "
                             "digits and underscores, starting with a letter")
        if name in FUNCTIONS:
            raise ModelError(f"{where}: {what} name {name!r} is reserved for a function")
    return name


# Letters of other scripts drawn like Latin ones (NFKC keeps them apart).
_HOMOGLYPHS = str.maketrans(
    "АВЕКМНОРСТХУаеорсухіјѕІЈЅԁһԛԝүΑΒΕΖΗΙΚΜΝΟΡΤΥΧο",
    "ABEKMHOPCTXYaeopcyxijsIJSdhqwyABEZHIKMNOPTYXo")


def lookalike_clash(names, what: str, where: str) -> None:
    """Refuse two different names that are drawn alike (``Apo`` and ``Аpo``
    with a Cyrillic A): a file could otherwise use one where the reader sees
    the other. The message names the differing character and its position."""
    seen: dict[str, str] = {}
    for name in names:
        key = name.translate(_HOMOGLYPHS)
        other = seen.setdefault(key, name)
        if other != name:
            pos, ch = next((i, a if a != a.translate(_HOMOGLYPHS) else b)
                           for i, (a, b) in enumerate(zip(name, other), 1) if a != b)
            raise ModelError(f"{where}: {what} names {other!r} and {name!r} look alike "
                             f"(character {_char_name(ch)} at position {pos}); rename one")


# ---------------------------------------------------------------- rate labels

def _clip(source: str, n: int = 80) -> str:
    return repr(source if len(source) <= n else source[:n] + "...")


# Successful parses and constant values by input (both immutable and
# independent of the place named in messages): a 100,000-edge file repeats
# a handful of rate texts. Bounded; refusals are never cached.
_MEMO_SIZE = 4096  # entries (texts up to MAX_LABEL_LENGTH): a few MB at most
_PARSED: dict = {}
_CONSTANTS: dict = {}


def _remember(memo: dict, key, value):
    if len(memo) >= _MEMO_SIZE:
        memo.clear()
    memo[key] = value
    return value


def parse_label(text, *, where: str = "rate") -> Label:
    """Parse one rate label into a tuple tree.

    ``where`` names the place (file and edge) for error messages.

    >>> parse_label("k1*c")
    ('mul', ('sym', 'k1'), ('sym', 'c'))
    """
    key = (type(text), text) if isinstance(text, (str, int, float)) else None
    if key in _PARSED:
        return _PARSED[key]
    label = _parse_label(text, where)
    return label if key is None else _remember(_PARSED, key, label)


def _parse_label(text, where: str) -> Label:
    if not isinstance(text, (str, int, float)) or isinstance(text, bool):
        raise ModelError(f"{where}: rate must be a string or a number, got {type(text).__name__}")
    if isinstance(text, (int, float)):
        label = _number(text, where, None)
        constant_value(label, where)
        return label
    source = text.strip()
    if not source:
        raise ModelError(f"{where}: empty rate expression")
    if len(source) > MAX_LABEL_LENGTH:
        raise ModelError(f"{where}: rate expression longer than {MAX_LABEL_LENGTH} characters")
    fault = _text_fault(source, letters_only=True, allow_newlines=True)
    if fault:
        raise ModelError(f"{where}: rate {_clip(source)}: {fault}")
    depth = 0
    for ch in source:
        depth += ch == "("
        depth -= ch == ")"
        if depth > MAX_NESTING:
            raise ModelError(f"{where}: rate expression nested deeper than {MAX_NESTING} parentheses")
    if "__" in source:
        raise ModelError(f"{where}: names with double underscores are not allowed in {_clip(source)}")
    try:
        with warnings.catch_warnings():  # the text is data: no SyntaxWarning lines on stderr
            warnings.simplefilter("ignore")
            tree = ast.parse(source, mode="eval")
    except SyntaxError:
        raise ModelError(f"{where}: malformed rate expression {_clip(source)}") from None
    except (RecursionError, MemoryError, ValueError):
        raise ModelError(f"{where}: rate expression {_clip(source)} is too complex to parse") from None
    label = _Converter(where, source).convert(tree.body, 0)
    constant_value(label, where)
    return label


def _number(value, where: str, source: str | None, literal: str | None = None) -> Label:
    """A numeric constant; decimal literals are read exactly (``0.1`` is 1/10)."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        shown = _clip(source) if source else safe_text(repr(value))
        raise ModelError(f"{where}: only numbers are allowed as constants in {shown}")
    shown = _clip(literal or repr(value))
    if isinstance(value, float):
        if not math.isfinite(value):
            raise ModelError(f"{where}: non-finite number {shown}")
        exact = Fraction(value)
        if literal is not None:
            try:
                exact = Fraction(literal.replace("_", ""))
            except (ValueError, ZeroDivisionError):
                pass
    elif value.bit_length() > MAX_CONSTANT_BITS:
        raise ModelError(f"{where}: number with {len(str(abs(value)))} digits is too large for a rate")
    else:
        exact = Fraction(value)
    try:
        return ("num", _bounded(exact))
    except _Refuse as why:
        raise ModelError(f"{where}: the number {shown} {why}") from None


def _start(node: ast.AST) -> tuple:
    return (node.lineno, node.col_offset)


class _Converter:
    """ast → Label. Sums and products are flattened along their chain
    without recursion, so ``k1 + k2 + ... + k500`` is one n-ary node and only
    genuine nesting counts towards :data:`MAX_DEPTH`."""

    def __init__(self, where: str, source: str):
        self.where, self.source = where, source

    def fail(self, node, message: str):
        raise ModelError(f"{self.where}: {message} ({_clip(self.source)})")

    def segment(self, node) -> str:
        return ast.get_source_segment(self.source, node) or type(node).__name__

    def convert(self, node: ast.AST, depth: int) -> Label:
        if depth > MAX_DEPTH:
            self.fail(node, f"rate expression is nested more than {MAX_DEPTH} operations deep")
        if isinstance(node, ast.Constant):
            literal = self.segment(node) if isinstance(node.value, float) else None
            return _number(node.value, self.where, self.source, literal)
        if isinstance(node, ast.Name):
            if node.id.startswith("_"):
                self.fail(node, f"names starting with an underscore are not allowed ({node.id!r})")
            if node.id in FUNCTIONS:
                self.fail(node, f"function {node.id!r} used without an argument")
            return ("sym", node.id)
        if isinstance(node, ast.BinOp) and isinstance(node.op, (ast.Add, ast.Sub)):
            return self.chain(node, (ast.Add, ast.Sub), depth)
        if isinstance(node, ast.BinOp) and isinstance(node.op, ast.Mult):
            return self.chain(node, (ast.Mult,), depth)
        if isinstance(node, ast.BinOp) and type(node.op) in _BINOPS:
            return (_BINOPS[type(node.op)], self.convert(node.left, depth + 1),
                    self.convert(node.right, depth + 1))
        if isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.USub, ast.UAdd)):
            inner = self.convert(node.operand, depth + 1)
            return ("neg", inner) if isinstance(node.op, ast.USub) else inner
        if isinstance(node, ast.Call):
            func = node.func
            if not isinstance(func, ast.Name) or func.id not in FUNCTIONS:
                self.fail(node, f"call to {self.segment(func)[:40]!r} is not allowed; only exp, log and sqrt")
            if len(node.args) != 1 or node.keywords:
                self.fail(node, f"{func.id} takes exactly one argument")
            return (func.id, self.convert(node.args[0], depth + 1))
        self.fail(node, f"{self.segment(node)[:40]!r} is not arithmetic; allowed are numbers, names, "
                        "+ - * / ** ( ) and exp, log, sqrt")

    def chain(self, node: ast.BinOp, ops: tuple, depth: int) -> Label:
        """A chain of the same kind of operator (``a+b-c+d``, ``a*b*c``) read
        without recursion; a parenthesised left operand stays one term.
        Chains of up to :data:`SHORT_CHAIN` terms keep Python's left-to-right
        tree; longer ones become a balanced binary tree (same exact value,
        logarithmic depth), so flat sums of many terms are accepted."""
        terms = []  # (negated, ast node), right to left
        while isinstance(node, ast.BinOp) and isinstance(node.op, ops):
            terms.append((isinstance(node.op, ast.Sub), node.right))
            parent, node = node, node.left
            if _start(node) != _start(parent):  # "(a+b)+c": the user's grouping is kept
                break
        terms.append((False, node))
        terms.reverse()
        kids = [(neg, self.convert(t, depth + 1)) for neg, t in terms]
        kind = "mul" if ops[0] is ast.Mult else "add"
        self.check_constant_part(kind, kids)
        if len(kids) <= SHORT_CHAIN:
            neg, out = kids[0]
            for neg, kid in kids[1:]:
                out = ("sub" if neg else kind, out, kid)
            return out
        neg, out = _balanced(kind, kids)
        return ("neg", out) if neg else out

    def check_constant_part(self, kind: str, kids: list) -> None:
        """Folding combines the constant terms of a chain into one: bound it."""
        consts = [(neg, constant_value(k, self.where)) for neg, k in kids]
        consts = [-v if neg else v for neg, v in consts if v is not None]
        if 1 < len(consts) < len(kids):
            try:
                _bounded(_apply(kind, consts))
            except _Refuse as why:
                self.fail(None, f"the constant terms of this {'sum' if kind == 'add' else 'product'}, combined, "
                                f"{why}")


def _balanced(kind: str, kids: list) -> tuple:
    """(negated, tree) of a balanced binary tree over signed terms; a
    negative half is subtracted (a + (-b) is a - b exactly)."""
    if len(kids) == 1:
        return kids[0]
    half = len(kids) // 2
    (na, a), (nb, b) = _balanced(kind, kids[:half]), _balanced(kind, kids[half:])
    if kind == "mul" or na == nb:
        return na, (kind, a, b)
    return (False, ("sub", a, b)) if nb else (False, ("sub", b, a))


# ---------------------------------------------------------------- constants

class _Refuse(Exception):
    pass


def _bounded(v):
    """``v`` if it is a finite constant of sane size, else raise _Refuse."""
    if isinstance(v, float):
        if not math.isfinite(v):
            raise _Refuse("is not finite")
        if v != 0 and not 1e-300 <= abs(v) <= 1e300:
            raise _Refuse(f"is {v:.3g}, outside the range [1e-300, 1e300] of a usable constant")
        return v
    if max(v.numerator.bit_length(), v.denominator.bit_length()) > MAX_CONSTANT_BITS:
        raise _Refuse(f"is too large to fold exactly (more than {MAX_CONSTANT_BITS} bits as a fraction)")
    lo, hi = CONSTANT_RANGE
    if v != 0 and not lo <= abs(v) <= hi:
        size = "large" if abs(v) > hi else "small"
        try:
            about = f"{float(abs(v)):.3g}" if float(abs(v)) else f"1e{_log10(abs(v)):+.0f}"
        except OverflowError:
            about = f"1e{_log10(abs(v)):+.0f}"
        raise _Refuse(f"is too {size} (about {about}; constants must lie in [1e-300, 1e300])")
    return v


def _log10(v: Fraction) -> float:
    return (v.numerator.bit_length() - v.denominator.bit_length()) * math.log10(2)


def _pow(a, b):
    if isinstance(b, Fraction) and b.denominator == 1 and isinstance(a, Fraction):
        if a == 0 and b < 0:
            raise _Refuse("is 0 to a negative power (a division by zero)")
        bits = max(a.numerator.bit_length(), a.denominator.bit_length()) - 1
        if abs(a) != 1 and abs(b) * bits > MAX_CONSTANT_BITS:
            raise _Refuse(f"is too large to fold exactly (more than {MAX_CONSTANT_BITS} bits as a fraction)")
        return a ** int(b)
    if a < 0:
        raise _Refuse("is a negative number to a non-integer power")
    if a == 0:
        if b < 0:
            raise _Refuse("is 0 to a negative power (a division by zero)")
        return Fraction(0) if b > 0 else Fraction(1)
    try:
        out = math.pow(float(a), float(b))
    except OverflowError:
        raise _Refuse("is not finite") from None
    if out == 0:
        raise _Refuse("underflows to zero in floating point")
    return out


def _apply(kind: str, xs: list):
    if kind in ("add", "mul"):
        out = xs[0]
        for x in xs[1:]:  # every partial result bounded: no runaway denominators
            out = _bounded(out + x if kind == "add" else out * x)
        return out
    if kind == "neg":
        return -xs[0]
    if kind == "sub":
        return xs[0] - xs[1]
    if kind == "div":
        if xs[1] == 0:
            raise _Refuse("divides by zero")
        return xs[0] / xs[1]
    if kind == "pow":
        return _pow(*xs)
    (a,) = xs
    if kind == "exp":
        if not -690 <= a <= 690:
            raise _Refuse("is outside the range [1e-300, 1e300] of a usable constant")
        return Fraction(1) if a == 0 else math.exp(a)
    if kind == "log":
        if a <= 0:
            raise _Refuse("is the logarithm of a number that is not positive")
        return Fraction(0) if a == 1 else math.log(a)
    if kind == "sqrt":
        if a < 0:
            raise _Refuse("is the square root of a negative number")
        if isinstance(a, Fraction):
            n, d = math.isqrt(a.numerator), math.isqrt(a.denominator)
            if n * n == a.numerator and d * d == a.denominator:
                return Fraction(n, d)
        return math.sqrt(a)
    raise AssertionError(kind)


def constant_value(label: Label, where: str = "rate"):
    """The value of ``label`` if it has no symbols (a Fraction when exact,
    else a float), or None. Every constant subexpression, also inside a label
    with symbols, is evaluated with bounded arithmetic and refused with a
    :class:`ModelError` when it is not finite, divides by zero, or lies
    outside [1e-300, 1e300] (zero is allowed inside an expression)."""
    if label in _CONSTANTS:
        return _CONSTANTS[label]

    def value(node):
        kind = node[0]
        if kind == "num":
            try:
                return _bounded(node[1])
            except _Refuse as why:
                raise ModelError(f"{where}: the number {_clip(label_text(node, brief=True))} {why}") from None
        if kind == "sym":
            return None
        xs = [value(k) for k in node[1:]]
        if kind == "div" and xs[1] is not None and xs[1] == 0:
            raise ModelError(f"{where}: {_clip(label_text(node, brief=True))} divides by zero")
        if any(x is None for x in xs):
            return None
        try:
            return _bounded(_apply(kind, xs))
        except _Refuse as why:
            raise ModelError(f"{where}: the constant {_clip(label_text(node, brief=True))} {why}") from None
        except (OverflowError, ZeroDivisionError, ValueError):
            raise ModelError(f"{where}: the constant {_clip(label_text(node, brief=True))} cannot be evaluated "
                             "in floating point") from None

    return _remember(_CONSTANTS, label, value(label))


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


def label_text(label: Label, *, brief: bool = False) -> str:
    """Canonical text of a label (fully parenthesised where needed).

    ``brief``: numbers longer than 12 digits are shown in scientific notation
    (for messages; not exact)."""
    kind = label[0]
    if kind == "num":
        v = label[1]
        if brief and max(len(str(v.numerator)), len(str(v.denominator))) > 12:
            return f"{float(v):.6g}" if 1e-300 <= abs(v) <= 1e300 else f"1e{_log10(abs(v)):+.0f}"
        return str(v.numerator) if v.denominator == 1 else f"({v.numerator}/{v.denominator})"
    if kind == "sym":
        return label[1]
    if kind == "neg":
        return f"(-{label_text(label[1], brief=brief)})"
    if kind in FUNCTIONS:
        return f"{kind}({label_text(label[1], brief=brief)})"
    sign = {"add": "+", "sub": "-", "mul": "*", "div": "/", "pow": "**"}[kind]
    return "(" + sign.join(label_text(k, brief=brief) for k in label[1:]) + ")"


# ---------------------------------------------------------------- model files

_TOP_KEYS = {"name", "description", "parameters", "inputs", "edges", "observables",
             "pairs", "parts", "couplings", "composition"}
_SYMBOL_KEYS = {"value", "min", "max", "description", "unit"}
_EDGE_KEYS = {"source", "target", "rate", "description"}


def _read_toml(path: Path, where: str) -> dict:
    """The TOML document of a model file; every failure is one ModelError line.
    A UTF-8 byte-order mark at the start is accepted."""
    try:
        if stat.S_ISCHR(path.stat().st_mode) or stat.S_ISBLK(path.stat().st_mode):
            raise ModelError(f"{where}: a device, not a model file")
        with open(path, "rb") as fh:
            raw = fh.read(MAX_MODEL_FILE_BYTES + 1)
    except FileNotFoundError:
        raise ModelError(f"{where}: no such model file") from None
    except OSError as exc:
        raise ModelError(f"{where}: cannot read model file ({exc.strerror or type(exc).__name__})") from None
    if len(raw) > MAX_MODEL_FILE_BYTES:
        raise ModelError(f"{where}: model file is larger than {MAX_MODEL_FILE_BYTES // 2**20} MB")
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = raw[:exc.start].count(b"\n") + 1
        raise ModelError(f"{where}: model file is not UTF-8 text (byte 0x{raw[exc.start]:02x} "
                         f"at line {line}); save it as UTF-8") from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ModelError(f"{where}: not valid TOML ({safe_text(exc)})") from None
    except (RecursionError, MemoryError):
        raise ModelError(f"{where}: not usable TOML (nested too deeply)") from None


def load(path) -> "Scheme":
    """Load a TOML model file into a :class:`~treeflux.compiler.model.Scheme`.

    Every refusal is a :class:`ModelError` whose one-line message names the
    file and the offending entry.
    """
    path = Path(path)
    where = safe_text(path)
    data = _read_toml(path, where)
    return from_data(data, where=where, default_name=path.stem)


def from_data(data: dict, *, where: str = "scheme", default_name: str = "scheme") -> "Scheme":
    """A Scheme from the tables of a model file already read into dictionaries
    (the same keys as the TOML file: parameters, inputs, edges, pairs, parts,
    couplings, composition, observables). ``where`` names it in errors."""
    from .model import Scheme

    where = safe_text(where)
    if not isinstance(data, dict):
        raise ModelError(f"{where}: a model description is a table (dict)")
    unknown = set(data) - _TOP_KEYS
    if unknown:
        raise ModelError(f"{where}: unknown top-level key(s) {', '.join(safe_text(k) for k in sorted(unknown))}")
    name = data.get("name", default_name)
    check_name(name, "model", where)
    scheme = Scheme(name=name, origin=where)
    for section, adder in (("parameters", scheme.add_parameter), ("inputs", scheme.add_input)):
        table = data.get(section, {})
        if not isinstance(table, dict):
            raise ModelError(f"{where}: [{section}] must be a table")
        for sym, spec in table.items():
            check_name(sym, section[:-1], where, symbol=True)
            if isinstance(spec, (int, float)) and not isinstance(spec, bool):
                spec = {"value": spec}
            if not isinstance(spec, dict):
                raise ModelError(f"{where}: {section}.{sym} must be a table like {{ value = 1.0 }}")
            bad = set(spec) - _SYMBOL_KEYS
            if bad:
                raise ModelError(f"{where}: {section}.{sym} has unknown key(s) "
                                 f"{', '.join(safe_text(k) for k in sorted(bad))}")
            adder(sym, value=spec.get("value"), min=spec.get("min"), max=spec.get("max"))
    edges = data.get("edges", [])
    if not isinstance(edges, list):
        raise ModelError(f"{where}: 'edges' must be an array of tables ([[edges]])")
    for i, edge in enumerate(edges, 1):
        if not isinstance(edge, dict):
            raise ModelError(f"{where}: edge {i} must be a table")
        bad = set(edge) - _EDGE_KEYS
        if bad:
            raise ModelError(f"{where}: edge {i} has unknown key(s) {', '.join(safe_text(k) for k in sorted(bad))}")
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
        check_name(obs, "observable", where)
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
