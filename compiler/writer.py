"""Model files written back out: a Scheme as TOML text that :func:`load` reads.

Used by ``treeflux equilibrium`` (the restricted scheme) and by anything
that derives a scheme from another. Every string goes out as a TOML basic
string (JSON escapes are a subset of TOML's), every key quoted, so any name
that the loader accepted round-trips.
"""

from __future__ import annotations

import json

__all__ = ["model_text"]


def _s(text: str) -> str:
    return json.dumps(text, ensure_ascii=False)


def _num(x: float) -> str:
    return repr(float(x))


def _weight(v) -> str:
    """An observable's weight: a number, an expression, an edge or a list of edges."""
    if isinstance(v, str):
        return _s(v)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_s(x) for x in v) + "]"
    return _num(v)


def _symbol(sym) -> str:
    fields = [f"{k} = {_num(v)}" for k, v in (("value", sym.value), ("min", sym.min), ("max", sym.max))
              if v is not None]
    return "{ " + ", ".join(fields) + " }" if fields else "{}"


def model_text(scheme, *, comment: str = "") -> str:
    """The TOML model file of ``scheme`` (parameters, inputs, edges, observables)."""
    lines = [f"# {line}" for line in comment.splitlines()]
    lines.append(f"name = {_s(scheme.name)}")
    for title, table in (("parameters", scheme.parameters), ("inputs", scheme.inputs)):
        if table and not scheme.implicit_symbols:
            lines += ["", f"[{title}]"] + [f"{_s(s.name)} = {_symbol(s)}" for s in table]
    for e in scheme.edges:
        lines += ["", "[[edges]]", f"source = {_s(e.source)}", f"target = {_s(e.target)}",
                  f"rate = {_s(e.rate)}"]
    if scheme.observables:
        lines += ["", "[observables]"]
        for name, weights in scheme.observables.items():
            inner = ", ".join(f"{_s(k)} = {_weight(v)}" for k, v in weights.items())
            lines.append(f"{_s(name)} = {{ {inner} }}")
    return "\n".join(lines) + "\n"
