"""Composed schemes: a product of small parts with coupling factors.

Many molecular machines are built from parts that change state one at a
time — binding sites, a conformation, a recruited polymerase, a count of
bound ligands — and the rate of one part's step depends on the states of the
others (cooperativity, recruitment, allosteric coupling, energy-driven
steps). Writing the product out edge by edge takes 2^n·n blocks for n
sites; here it is described once and expanded into a plain
:class:`~treeflux.compiler.model.Scheme` before anything else sees it.

Model-file syntax (all keys are this project's own)::

    [composition]
    ground = "empty"       # name of the state where every part shows ""
    separator = ""         # joins the parts' labels into a state name

    [parts.A]              # one part: its states, then its steps
    states = ["", "A"]
    steps = [["", "A", "a_on*c", "a_off"]]   # from, to, forward (, backward)

    [parts.S]
    copies = 3             # S1, S2, S3; "{k}" in any string is the copy number
    states = ["", "s{k}"]
    steps = [{ from = "", to = "s{k}", K = "c/Kd", backward = "k_off" }]

    [[couplings]]          # multiply one step's rate ...
    part = "P"
    step = ["", "P"]       # ... the step from "" to "P" of part P ...
    factor = "w"           # ... by w ...
    when = ["A", "B", "C"] # ... once for every listed part not in its first state

A step is ``[from, to, rate]`` (one way), ``[from, to, forward, backward]``
(a reversible pair), or a table with ``from``, ``to`` and two of
``forward``, ``backward`` and ``K`` (the equilibrium constant
forward/backward — the way binding steps are written). ``{a..b}`` in a
string expands to the integers a..b; the fields of one step expand in
lockstep, so ``["R{0..2}", "R{1..3}", "k_p"]`` is three steps and
``states = ["L{0..4}"]`` five states. A ``when`` entry ``"P"`` counts each
copy of part P (other than the stepping copy) that is not in its first
state; ``"P=label"`` counts each copy showing that label.

Observables may also count parts: ``bound = { parts = "S" }`` weighs each
state by the number of copies of S not in their first state, and
``{ parts = "conf=R" }`` by the copies showing label R.

The same description in Python: :func:`compose` takes the parsed TOML
tables as dictionaries. Generated state names, their order (product order,
first part slowest) and the edge order depend only on the description, so
the same description gives the same bytes of emitted code.
"""

from __future__ import annotations

import itertools
import re
from dataclasses import dataclass

from .errors import ModelError
from .parse import label_text, parse_label

__all__ = ["compose", "add_pairs", "pair_rates", "MAX_COMPOSED_STATES"]

# A composed description that would generate more states than this is
# refused with the count before anything is generated.
MAX_COMPOSED_STATES = 4096
_RANGE = re.compile(r"\{(-?\d+)\.\.(-?\d+)\}")
_STEP_KEYS = {"from", "to", "rate", "forward", "backward", "K", "description"}
_PART_KEYS = {"states", "steps", "copies", "description"}
_COUPLING_KEYS = {"part", "step", "factor", "when", "description"}
_COMPOSITION_KEYS = {"ground", "separator", "description"}


# ---------------------------------------------------------------- reversible pairs

def pair_rates(spec: dict, where: str) -> tuple[str, str | None]:
    """(forward, backward) rate texts of a step table: forward/backward given,
    or one of them with the equilibrium constant K = forward/backward."""
    given = [k for k in ("rate", "forward", "backward", "K") if k in spec]
    if "rate" in given:
        if len(given) > 1:
            raise ModelError(f"{where}: give 'rate' (one way) or two of forward, backward, K; not both")
        return _text(spec["rate"], where), None
    if len(given) != 2:
        raise ModelError(f"{where}: a reversible step needs two of forward, backward and K, got "
                         f"{', '.join(given) or 'none'}")
    f, b, K = (spec.get(k) for k in ("forward", "backward", "K"))
    if K is None:
        return _text(f, where), _text(b, where)
    K = _text(K, where)
    if f is None:
        b = _text(b, where)
        return label_text(("mul", parse_label(K, where=where), parse_label(b, where=where))), b
    f = _text(f, where)
    return f, label_text(("div", parse_label(f, where=where), parse_label(K, where=where)))


def _text(value, where: str) -> str:
    if isinstance(value, bool) or not isinstance(value, (str, int, float)):
        raise ModelError(f"{where}: a rate must be a string or a number, got {type(value).__name__}")
    return str(value)


def add_pairs(scheme, pairs, where: str) -> None:
    """``[[pairs]]`` of a plain model file: each a reversible pair in one block
    (``from``, ``to`` and two of forward, backward, K)."""
    if not isinstance(pairs, list):
        raise ModelError(f"{where}: 'pairs' must be an array of tables ([[pairs]])")
    for i, spec in enumerate(pairs, 1):
        at = f"{where}: pair {i}"
        if not isinstance(spec, dict):
            raise ModelError(f"{at} must be a table")
        _only(spec, _STEP_KEYS - {"rate"}, at)
        for key in ("from", "to"):
            if not isinstance(spec.get(key), str):
                raise ModelError(f"{at} needs '{key}' (a state name)")
        forward, backward = pair_rates(spec, f"{at} ({spec['from']}<->{spec['to']})")
        scheme.add_edge(spec["from"], spec["to"], forward)
        scheme.add_edge(spec["to"], spec["from"], backward)


def _only(table: dict, allowed: set, where: str) -> None:
    bad = set(table) - allowed
    if bad:
        raise ModelError(f"{where} has unknown key(s) {', '.join(sorted(bad))}")


# ---------------------------------------------------------------- expansion of {a..b}

def _expand(text: str, where: str) -> list[str]:
    """All strings a text with ``{a..b}`` ranges stands for (ranges in lockstep)."""
    ranges = _RANGE.findall(text)
    if not ranges:
        return [text]
    spans = [_span(int(a), int(b)) for a, b in ranges]
    if len({len(s) for s in spans}) != 1:
        raise ModelError(f"{where}: the ranges in {text!r} have different lengths")
    out = []
    for values in zip(*spans):
        it = iter(values)
        out.append(_RANGE.sub(lambda _m: str(next(it)), text))
    return out


def _span(a: int, b: int) -> list[int]:
    if abs(b - a) > MAX_COMPOSED_STATES:
        raise ModelError(f"range {{{a}..{b}}} is longer than {MAX_COMPOSED_STATES}")
    return list(range(a, b + 1)) if b >= a else list(range(a, b - 1, -1))


def _lockstep(fields: list, where: str) -> list[list]:
    """Expand each string field; fields with ranges must agree in length."""
    expanded = [_expand(f, where) if isinstance(f, str) else [f] for f in fields]
    n = max(len(e) for e in expanded)
    if any(len(e) not in (1, n) for e in expanded):
        raise ModelError(f"{where}: the ranges of one step expand to different lengths")
    return [[e[0] if len(e) == 1 else e[t] for e in expanded] for t in range(n)]


# ---------------------------------------------------------------- parts

@dataclass
class _Step:
    source: str
    target: str
    rate: str


@dataclass
class _Part:
    name: str        # copy name: "S2" for the second copy of S
    base: str        # "S"
    copy: int        # 1-based copy number (1 for a single part)
    states: list     # labels, first = ground
    steps: list      # [_Step]


def _copy_text(value, k: int):
    return value.replace("{k}", str(k)) if isinstance(value, str) else value


def _parts(table, where: str) -> list[_Part]:
    if not isinstance(table, dict) or not table:
        raise ModelError(f"{where}: [parts] must be a table of parts, e.g. [parts.A]")
    out = []
    for base, spec in table.items():
        at = f"{where}: part {base!r}"
        if not isinstance(spec, dict):
            raise ModelError(f"{at} must be a table")
        _only(spec, _PART_KEYS, at)
        copies = spec.get("copies", 1)
        if isinstance(copies, bool) or not isinstance(copies, int) or not 1 <= copies <= 64:
            raise ModelError(f"{at}: copies must be a whole number from 1 to 64")
        for k in range(1, copies + 1):
            name = base if copies == 1 else f"{base}{k}"
            states = []
            for label in spec.get("states") or []:
                if not isinstance(label, str):
                    raise ModelError(f"{at}: state labels must be strings")
                states += _expand(_copy_text(label, k), at)
            if len(states) < 2:
                raise ModelError(f"{at}: needs at least two states")
            if len(set(states)) != len(states):
                raise ModelError(f"{at}: a state label appears twice")
            out.append(_Part(name, base, k, states, _steps(spec.get("steps"), states, k, at)))
    return out


def _steps(raw, states, k: int, at: str) -> list[_Step]:
    if not isinstance(raw, list) or not raw:
        raise ModelError(f"{at}: needs 'steps', a list of [from, to, rate] or [from, to, forward, backward]")
    steps = []
    for i, item in enumerate(raw, 1):
        where = f"{at}, step {i}"
        if isinstance(item, list):
            if len(item) not in (3, 4):
                raise ModelError(f"{where}: write [from, to, rate] or [from, to, forward, backward]")
            spec = dict(zip(("from", "to", "forward", "backward"), item))
            if len(item) == 3:
                spec = {"from": item[0], "to": item[1], "rate": item[2]}
        elif isinstance(item, dict):
            _only(item, _STEP_KEYS, where)
            spec = item
        else:
            raise ModelError(f"{where}: must be a list or a table")
        keys = [key for key in ("from", "to", "rate", "forward", "backward", "K") if key in spec]
        for row in _lockstep([_copy_text(spec[key], k) for key in keys], where):
            one = dict(zip(keys, row))
            a, b = one.get("from"), one.get("to")
            for label in (a, b):
                if label not in states:
                    raise ModelError(f"{where}: {label!r} is not a state of this part "
                                     f"({', '.join(map(repr, states))})")
            if a == b:
                raise ModelError(f"{where}: a step must change the part's state")
            forward, backward = pair_rates(one, f"{where} ({a!r}->{b!r})")
            steps.append(_Step(a, b, forward))
            if backward is not None:
                steps.append(_Step(b, a, backward))
    return steps


# ---------------------------------------------------------------- couplings

@dataclass
class _Coupling:
    base: str
    source: str
    target: str
    factor: tuple           # parsed label
    when: list              # [(part base, label or None)]


def _couplings(raw, parts: list[_Part], where: str) -> list[_Coupling]:
    if raw is None:
        return []
    if not isinstance(raw, list):
        raise ModelError(f"{where}: 'couplings' must be an array of tables ([[couplings]])")
    bases = {p.base: p for p in parts}
    out = []
    for i, spec in enumerate(raw, 1):
        at = f"{where}: coupling {i}"
        if not isinstance(spec, dict):
            raise ModelError(f"{at} must be a table")
        _only(spec, _COUPLING_KEYS, at)
        base = spec.get("part")
        if base not in bases:
            raise ModelError(f"{at}: 'part' must name a part ({', '.join(bases)})")
        step = spec.get("step")
        if not (isinstance(step, list) and len(step) == 2 and all(isinstance(s, str) for s in step)):
            raise ModelError(f"{at}: 'step' must be [from, to], labels of part {base!r}")
        factor = parse_label(_text(spec.get("factor", ""), at), where=f"{at} factor")
        when = []
        for entry in spec.get("when") or []:
            if not isinstance(entry, str):
                raise ModelError(f"{at}: 'when' entries are part names or part=label")
            other, _, label = entry.partition("=")
            if other not in bases:
                raise ModelError(f"{at}: 'when' names unknown part {other!r}")
            if other == base and len([p for p in parts if p.base == base]) == 1:
                raise ModelError(f"{at}: a step cannot be coupled to its own part {base!r}")
            when.append((other, label if "=" in entry else None))
        if not when:
            raise ModelError(f"{at}: 'when' must list at least one part")
        out.append(_Coupling(base, step[0], step[1], factor, when))
    return out


def _multiplicity(c: _Coupling, mover: _Part, parts: list[_Part], combo: tuple) -> int:
    count = 0
    for base, label in c.when:
        for part, state in zip(parts, combo):
            if part.base != base or part is mover:
                continue
            count += (state != part.states[0]) if label is None else (state == label)
    return count


# ---------------------------------------------------------------- the product

def compose(scheme, data: dict, where: str) -> dict:
    """Expand ``[parts]``/``[[couplings]]``/``[composition]`` of ``data`` into
    ``scheme`` (states and edges). Returns the state name of every combination
    (for observables that count parts)."""
    settings = data.get("composition", {})
    if not isinstance(settings, dict):
        raise ModelError(f"{where}: [composition] must be a table")
    _only(settings, _COMPOSITION_KEYS, f"{where}: [composition]")
    ground = settings.get("ground", "ground")
    sep = settings.get("separator", "")
    if not isinstance(ground, str) or not isinstance(sep, str):
        raise ModelError(f"{where}: [composition] ground and separator must be strings")
    parts = _parts(data.get("parts"), where)
    total = 1
    for p in parts:
        total *= len(p.states)
    if total > MAX_COMPOSED_STATES:
        raise ModelError(f"{where}: the composition generates {total:,} states "
                         f"(limit {MAX_COMPOSED_STATES:,}); lump identical parts by count, "
                         "e.g. states = [\"L{0..n}\"]")
    couplings = _couplings(data.get("couplings"), parts, where)
    for c in couplings:
        for p in parts:
            if p.base == c.base and not any(s.source == _copy_text(c.source, p.copy)
                                             and s.target == _copy_text(c.target, p.copy) for s in p.steps):
                raise ModelError(f"{where}: coupling on part {c.base!r}: it has no step "
                                 f"{c.source!r}->{c.target!r}")
    combos = list(itertools.product(*(p.states for p in parts)))
    names = {}
    for combo in combos:
        name = sep.join(label for label in combo if label) or ground
        if name in names.values():
            other = next(k for k, v in names.items() if v == name)
            raise ModelError(f"{where}: two combinations are both named {name!r} "
                             f"({_show(parts, other)} and {_show(parts, combo)}); "
                             "set [composition] separator or make the labels distinct")
        names[combo] = name
    for combo in combos:
        scheme.add_state(names[combo])
    for combo in combos:
        for slot, part in enumerate(parts):
            for step in part.steps:
                if combo[slot] != step.source:
                    continue
                label = plain = parse_label(step.rate, where=f"{where}: part {part.name!r}")
                for c in couplings:
                    if (c.base == part.base and _copy_text(c.source, part.copy) == step.source
                            and _copy_text(c.target, part.copy) == step.target):
                        m = _multiplicity(c, part, parts, combo)
                        if m:
                            factor = c.factor if m == 1 else ("pow", c.factor, ("num", m))
                            label = ("mul", label, factor)
                target = combo[:slot] + (step.target,) + combo[slot + 1:]
                scheme.add_edge(names[combo], names[target], step.rate if label is plain else label_text(label))
    composition = {"parts": parts, "names": names}
    scheme.composition = composition  # for drawings laid out along the parts
    return composition


def _show(parts, combo) -> str:
    return "{" + ", ".join(f"{p.name}={label!r}" for p, label in zip(parts, combo)) + "}"


def count_weights(composition: dict, spec: str, where: str) -> dict:
    """State weights of an observable ``{ parts = "S" }`` or ``{ parts = "S=label" }``."""
    if not isinstance(spec, str):
        raise ModelError(f"{where}: 'parts' must be a part name or part=label")
    base, _, label = spec.partition("=")
    parts = composition["parts"]
    if base not in {p.base for p in parts}:
        raise ModelError(f"{where}: unknown part {base!r}")
    weights = {}
    for combo, name in composition["names"].items():
        w = sum((state != p.states[0]) if not label else (state == label)
                for p, state in zip(parts, combo) if p.base == base)
        if w:
            weights[name] = float(w)
    if not weights:
        raise ModelError(f"{where}: no state has part {spec!r}")
    return weights
