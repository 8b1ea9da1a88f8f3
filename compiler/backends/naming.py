"""Names in generated code: identifiers derived safely, names as escaped literals.

User text (model, state, symbol and observable names, ``compile_scheme(name=...)``)
reaches generated code only through this module:

- :func:`stem` turns any text into an ASCII identifier (file stems, C prefixes,
  Python module names); nothing of the original survives but letters, digits
  and ``_``.
- :func:`c_string` and :func:`py_string` spell a name as a string literal that
  reads back as the name and cannot end the literal, a comment or a line: C
  literals escape every byte outside printable ASCII (octal, three digits, so
  a following digit is never absorbed), ``"``, ``\\`` and ``?`` (no trigraphs);
  Python literals are ``ascii()`` reprs (pure ASCII, every quote, backslash,
  newline and non-ASCII character escaped).
- :func:`c_constants` derives collision-free C identifiers for index
  constants; the original name stays in the string arrays beside them.

:class:`Interface` is what an emitter needs to know about the model beyond
the IR: names, default values and the output layout.
"""

from __future__ import annotations

import keyword
import math
import re
import sys
from dataclasses import dataclass

from ..errors import ModelError

#: Longest identifier stem we derive (C99 guarantees 63 significant characters).
MAX_STEM = 40
#: Stems that would collide with a file emitted beside the model (main.c,
#: setup.py) or shadow a module the emitted code imports or a user may need.
RESERVED_STEMS = frozenset({"main", "setup", "build", "numpy", "cython", "setuptools",
                            "treeflux", *(m.lower() for m in sys.stdlib_module_names)})


def stem(text, *, fallback: str = "model") -> str:
    """An ASCII identifier made from ``text``: other characters become ``_``,
    runs of ``_`` shrink to one, a leading digit gets the prefix ``m_``, and a
    Python keyword or a name in :data:`RESERVED_STEMS` (``main``, ``setup``,
    ``numpy``, the standard library's modules) gets the suffix ``_model``.
    Lower case.

    >>> stem('my-model "v2"\\n')
    'my_model_v2'
    """
    ident = re.sub(r"[^A-Za-z0-9]+", "_", str(text)).strip("_").lower()[:MAX_STEM].strip("_")
    if not ident:
        ident = fallback
    if not ident[0].isalpha():
        ident = "m_" + ident
    if keyword.iskeyword(ident) or ident in RESERVED_STEMS:
        ident += "_model"
    return ident


def c_string(name: str) -> str:
    """``name`` as a C string literal (UTF-8 bytes; see the module doc).

    A NUL cannot live in a C string; such names are refused by
    :func:`check_c_names` before this is reached."""
    out = []
    for byte in str(name).encode("utf-8", "surrogatepass"):
        ch = chr(byte)
        if 0x20 <= byte < 0x7F and ch not in '"\\?':
            out.append(ch)
        else:
            out.append("\\%03o" % byte)
    return '"' + "".join(out) + '"'


def py_string(name: str) -> str:
    """``name`` as a pure-ASCII Python string literal that evaluates to it."""
    return ascii(str(name))


def py_float(v: float) -> str:
    """A float literal that reads back exactly (``float('inf')`` spelled out)."""
    v = float(v)
    return repr(v) if math.isfinite(v) else f"float({str(v)!r})"


def py_tuple(names) -> str:
    """A tuple literal of escaped names."""
    items = [py_string(n) for n in names]
    return "(" + ", ".join(items) + ("," if len(items) == 1 else "") + ")"


def py_defaults(iface: "Interface") -> str:
    """A dict literal: symbol name -> the model's value (symbols with one)."""
    return "{" + ", ".join(f"{py_string(s)}: {py_float(v)}" for j, (s, v) in
                           enumerate(zip(iface.symbols, iface.defaults))
                           if iface.has_default(j)) + "}"


def py_groups(iface: "Interface") -> str:
    """A dict literal: output group -> (start, stop)."""
    return "{" + ", ".join(f"{py_string(g)}: ({a}, {b})" for g, (a, b) in
                           sorted(iface.groups.items())) + "}"


def py_names(iface: "Interface") -> str:
    """The name constants of an emitted Python or Cython module."""
    return "\n".join([
        "# MODEL is the scheme's name; STATES, SYMBOLS (the input columns), OBSERVABLES",
        "# and OUTPUTS (every output column) name it; DEFAULTS maps a symbol to the",
        "# model's value (symbols without one are absent); GROUPS maps an output group",
        "# (p, basis, obs) to its (start, stop) columns.",
        f"MODEL = {py_string(iface.model)}",
        f"STATES = {py_tuple(iface.states)}",
        f"SYMBOLS = {py_tuple(iface.symbols)}",
        f"OBSERVABLES = {py_tuple(iface.observables)}",
        f"OUTPUTS = {py_tuple(iface.outputs)}",
        f"DEFAULTS = {py_defaults(iface)}",
        f"GROUPS = {py_groups(iface)}",
        f"N_STATES = {len(iface.states)}",
        f"N_OBSERVABLES = {len(iface.observables)}", ""])


_PY_API = '''

def _rows(X):
    import numpy as np
    X = np.asarray(X, dtype=np.float64)
    X = X.reshape(1, -1) if X.ndim == 1 else X
    if X.ndim != 2 or X.shape[1] != N_INPUTS:
        raise ValueError("X must have N_INPUTS = %d columns" % N_INPUTS)
    return np.ascontiguousarray(X)


def inputs(values=None):
    """One row (1, N_INPUTS): the model's defaults, updated from a dict."""
    import numpy as np
    values = dict(values or {{}})
    unknown = [k for k in values if k not in SYMBOLS]
    if unknown:
        raise KeyError("unknown symbol %r" % (unknown[0],))
    row = []
    for s in SYMBOLS:
        if s not in values and s not in DEFAULTS:
            raise KeyError("symbol %r has no default value; give one" % (s,))
        row.append(float(values.get(s, DEFAULTS.get(s))))
    return np.array([row], dtype=np.float64).reshape(1, N_INPUTS)


def evaluate(X{sig}):
    """Outputs (N, N_OUTPUTS) of inputs X (N, N_INPUTS) or one row;
    ValueError for a row that run() refuses."""
    import numpy as np
    X = _rows(X)
    out = np.empty((X.shape[0], N_OUTPUTS))
    status = run(X, out, 0, X.shape[0]{args})
    if status:
        raise ValueError("row %d refused: a non-finite input, a rate that is not positive "
                         "and finite, or a result that is not a probability vector" % (status - 1))
    return out


def steady_state(X{sig}):
    a, b = GROUPS.get("p", (0, 0))
    return evaluate(X{args})[:, a:b]


def observables(X{sig}):
    a, b = GROUPS.get("obs", (0, 0))
    return evaluate(X{args})[:, a:b]
'''


def py_model_api(*, threads: bool) -> str:
    """``inputs``, ``evaluate``, ``steady_state`` and ``observables`` of an
    emitted module, over its ``run`` (which takes ``threads`` in Cython)."""
    return _PY_API.format(sig=", threads=1" if threads else "", args=", threads" if threads else "")


def check_c_names(names, what: str) -> None:
    """Refuse names a C string cannot carry (an embedded NUL)."""
    for n in names:
        if "\0" in n:
            raise ModelError(f"{what} name {n!r} contains a NUL character, which a C string "
                             f"cannot hold; rename it before emitting C")


def c_constants(prefix: str, names, taken: set[str]) -> list[str]:
    """Collision-free C identifiers ``PREFIX_<stem>`` for ``names``, in order.

    Letters and digits are kept, a non-ASCII character is spelled ``u00E9``,
    anything else becomes ``_``. ``taken`` holds identifiers already used (it
    is updated); a clash gets ``_2``, ``_3``, ... (the first free suffix)."""
    out = []
    for n in names:
        spelled = "".join(ch if ch.isascii() else f"_u{ord(ch):04X}_" for ch in n)
        base = re.sub(r"[^A-Za-z0-9]+", "_", spelled).strip("_")[:MAX_STEM].strip("_") or "x"
        ident = f"{prefix}_{base}"
        k = 2
        while ident in taken:
            ident = f"{prefix}_{base}_{k}"
            k += 1
        taken.add(ident)
        out.append(ident)
    return out


@dataclass(frozen=True)
class Interface:
    """The model around an emitted Function: names, defaults, output layout.

    ``groups`` maps an output group (``p``, ``basis``, ``obs``) to its
    (start, stop) in the outputs; ``outputs`` names every output column;
    ``defaults`` holds one value per symbol (NaN where the model gives none);
    ``checks`` is the number of trailing outputs that are rates (edge labels)
    to be checked (> 0 and finite) and not written out."""

    model: str
    states: tuple
    symbols: tuple
    defaults: tuple
    observables: tuple
    groups: dict
    outputs: tuple
    checks: int = 0

    def has_default(self, j: int) -> bool:
        return not math.isnan(self.defaults[j])


def probability_blocks(iface: Interface) -> list[tuple[int, int]]:
    """(start, stop) of every output block that is a probability vector."""
    n = len(iface.states)
    blocks = []
    for group in ("p", "basis"):
        if group in iface.groups and n:
            a, b = iface.groups[group]
            blocks += [(k, k + n) for k in range(a, b, n)]
    return blocks


def probability_tolerance(n: int) -> float:
    """Bound on |Σp − 1| for n normalised doubles p_i = ρ_i/Σρ: each quotient
    and each partial sum rounds once, so (2n + 8)·ε covers it (ε = 2^-52)."""
    return float((2 * n + 8) * 2.0 ** -52)
