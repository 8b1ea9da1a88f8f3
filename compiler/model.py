"""The Scheme: states, directed edges with rate labels, symbols, observables.

A scheme is a continuous-time Markov chain on a graph of states. Edge i→j
carries a label ℓ(i→j) > 0, an arithmetic expression in parameters (rate
constants) and inputs (concentrations). Symbols are ordered parameters first,
then inputs, each in declaration order; compiled functions take their values
in that order.

If a scheme declares no parameters and no inputs at all, every name used in a
label becomes a parameter (in order of first appearance) and
:attr:`Scheme.implicit_symbols` is true; otherwise an undeclared name is an
error.
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass, field

from .errors import ModelError
from .parse import (Label, check_name, constant_value, label_symbols, label_text, lookalike_clash, parse_label,
                    safe_text)

# Reserved keys inside an observable: the one-way flux of an edge, the net
# flux of a reversible pair.
OBSERVABLE_KINDS = ("flux", "net_flux")


@dataclass(frozen=True)
class Symbol:
    name: str
    kind: str  # "parameter" or "input"
    value: float | None = None
    min: float | None = None
    max: float | None = None


@dataclass(frozen=True)
class Edge:
    source: str
    target: str
    rate: str       # the text as written
    label: Label    # the parsed tuple tree


def _number_label(value: float) -> Label:
    from fractions import Fraction
    return ("num", Fraction(value))


def _check_number(value, what: str, where: str, positive: bool = False):
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ModelError(f"{where}: {what} must be a number, got {safe_text(repr(value))[:60]}")
    try:
        value = float(value)
    except OverflowError:
        raise ModelError(f"{where}: {what} is too large for a float64 number") from None
    if not math.isfinite(value):
        raise ModelError(f"{where}: {what} must be finite, got {value!r}")
    if positive and value <= 0:
        raise ModelError(f"{where}: {what} must be positive, got {value!r}")
    return value


def _identically_zero(label: Label) -> bool:
    """A product (or quotient) with a constant factor 0: zero whatever the symbols."""
    kind = label[0]
    if kind == "mul":
        return any(constant_value(k) == 0 or _identically_zero(k) for k in label[1:])
    if kind in ("div", "neg"):
        return constant_value(label[1]) == 0 or _identically_zero(label[1])
    return False


@dataclass
class Scheme:
    """A kinetic scheme. Build it with :meth:`add_edge` and friends, or :func:`load`.

    >>> s = Scheme()
    >>> s.add_edge("E", "ES", "k1*S"); s.add_edge("ES", "E", "km1 + k2")
    >>> s.states, s.symbols
    (('E', 'ES'), ('k1', 'S', 'km1', 'k2'))
    """

    name: str = "scheme"
    origin: str = "scheme"  # the file or place named in messages (printable text)
    _states: dict[str, None] = field(default_factory=dict)  # insertion-ordered set: O(1) membership
    _edges: dict[tuple[str, str], Edge] = field(default_factory=dict)
    _params: dict[str, Symbol] = field(default_factory=dict)
    _inputs: dict[str, Symbol] = field(default_factory=dict)
    _observables: dict[str, dict[str, float]] = field(default_factory=dict)

    # ------------------------------------------------------------ building
    def __post_init__(self):
        self.origin = safe_text(self.origin)
        check_name(self.name, "model", self.origin)

    def _state_name(self, name) -> str:
        if name in self._states:
            return name
        check_name(name, "state", self.origin)
        if "->" in name:
            raise ModelError(f"{self.origin}: state name {name!r} must not contain '->' "
                             "(it separates the states of an edge)")
        return name

    def add_state(self, name: str) -> None:
        self._states.setdefault(self._state_name(name), None)

    def add_edge(self, source: str, target: str, rate) -> None:
        self._state_name(source)  # checked before they appear in a message
        self._state_name(target)
        where = f"{self.origin}: edge {source}->{target}"
        if source == target:
            raise ModelError(f"{where}: self-loop; a transition must change the state")
        if (source, target) in self._edges:
            raise ModelError(f"{where}: duplicate edge; combine the rates into one label")
        label = parse_label(rate, where=where)
        value = constant_value(label, where)
        if value is not None and not value > 0:
            raise ModelError(f"{where}: the rate {str(rate)!r} is the constant {float(value):g}; "
                             "a rate must be positive (remove an edge that never fires)")
        if _identically_zero(label):
            raise ModelError(f"{where}: the rate {str(rate)!r} has a constant factor 0, so it is zero "
                             "for every value of its symbols; a rate must be positive")
        self._states.setdefault(source, None)  # names checked above
        self._states.setdefault(target, None)
        self._edges[(source, target)] = Edge(source, target, str(rate), label)

    def _add_symbol(self, table, kind, name, value, min, max):
        check_name(name, kind, self.origin, symbol=True)
        where = f"{self.origin}: {kind} {name!r}"
        if name in self._params or name in self._inputs:
            raise ModelError(f"{where}: symbol declared twice")
        value = _check_number(value, "value", where)
        lo = _check_number(min, "min", where)
        hi = _check_number(max, "max", where)
        if lo is not None and hi is not None and lo > hi:
            raise ModelError(f"{where}: min {lo} is greater than max {hi}")
        if value is not None and ((lo is not None and value < lo) or (hi is not None and value > hi)):
            raise ModelError(f"{where}: value {value} lies outside [min, max]")
        table[name] = Symbol(name, kind, value, lo, hi)

    def add_parameter(self, name: str, *, value=None, min=None, max=None) -> None:
        self._add_symbol(self._params, "parameter", name, value, min, max)

    def add_input(self, name: str, *, value=None, min=None, max=None) -> None:
        self._add_symbol(self._inputs, "input", name, value, min, max)

    def add_observable(self, name: str, weights: dict) -> None:
        """Declare observable ``name``: a map state → weight (a number or a rate
        expression such as ``"k_cat"``), or ``{"flux": "A->B"}`` (the one-way
        flux p(A)·ℓ(A→B)), or ``{"net_flux": "A->B"}`` (p(A)ℓ(A→B) − p(B)ℓ(B→A)).
        ``flux``/``net_flux`` may also name a list of edges (their sum)."""
        check_name(name, "observable", self.origin)
        where = f"{self.origin}: observable {name!r}"
        if name in self._observables:
            raise ModelError(f"{where}: declared twice")
        if not isinstance(weights, dict) or not weights:
            raise ModelError(f"{where}: needs a non-empty map of state name to weight, "
                             "or { flux = \"A->B\" } or { net_flux = \"A->B\" }")
        kinds = [k for k in OBSERVABLE_KINDS if k in weights]
        if kinds:
            if len(weights) != 1:
                raise ModelError(f"{where}: {kinds[0]!r} stands alone (a reserved key; it cannot be "
                                 "mixed with state weights or the other flux key)")
            edges = weights[kinds[0]]
            edges = [edges] if isinstance(edges, str) else edges
            if not isinstance(edges, (list, tuple)) or not edges or \
                    not all(isinstance(e, str) and "->" in e for e in edges):
                raise ModelError(f"{where}: {kinds[0]} must name an edge as \"A->B\" (or a list of them)")
            clean = {kinds[0]: weights[kinds[0]] if isinstance(weights[kinds[0]], str) else list(edges)}
        else:
            clean = {}
            for state, w in weights.items():
                check_name(state, "state", where)
                if isinstance(w, str):
                    parse_label(w, where=f"{where}: weight of state {state!r}")
                    clean[state] = w
                else:
                    clean[state] = _check_number(w, f"weight of state {state!r}", where)
        self._observables[name] = clean

    def observable_terms(self) -> dict[str, list[tuple[str, Label]]]:
        """Every observable reduced to Σ_i p_i·w_i(θ): name → [(state, weight label)].

        A weight label is a number, a rate expression, an edge's label (a
        flux) or ``("neg", label)`` (the backward half of a net flux; the only
        subtraction an observable adds above the labels). Unknown states and
        edges are refused naming them."""
        edges = self._edges
        out = {}
        for name, spec in self._observables.items():
            where = f"{self.origin}: observable {name!r}"
            kind = next((k for k in OBSERVABLE_KINDS if k in spec), None)
            if kind is None:
                terms = []
                for state, w in spec.items():
                    if state not in self._states:
                        raise ModelError(f"{where} names unknown state {state!r}")
                    label = parse_label(w, where=f"{where}: weight of state {state!r}") \
                        if isinstance(w, str) else _number_label(w)
                    terms.append((state, label))
                out[name] = terms
                continue
            listed = [spec[kind]] if isinstance(spec[kind], str) else spec[kind]
            terms = []
            for text in listed:
                a, b = self._edge_named(text, where)
                terms.append((a, edges[(a, b)].label))
                if kind == "net_flux":
                    if (b, a) not in edges:
                        raise ModelError(f"{where}: net_flux needs the reverse edge {b}->{a}, which the "
                                         f"scheme does not have; use {{ flux = \"{a}->{b}\" }}")
                    terms.append((b, ("neg", edges[(b, a)].label)))
            out[name] = terms
        return out

    def _edge_named(self, text: str, where: str) -> tuple[str, str]:
        """(source, target) of an edge written ``A->B`` (spaces around the arrow allowed)."""
        pieces = text.split("->")
        for cut in range(1, len(pieces)):
            a, b = "->".join(pieces[:cut]).strip(), "->".join(pieces[cut:]).strip()
            if (a, b) in self._edges:
                return a, b
        a, b = (x.strip() for x in text.split("->", 1))
        missing = [s for s in (a, b) if s not in self._states]
        if missing:
            raise ModelError(f"{where}: edge {a}->{b}: unknown state {missing[0]!r}")
        raise ModelError(f"{where}: the scheme has no edge {a}->{b}")

    # ------------------------------------------------------------ reading
    @property
    def states(self) -> tuple[str, ...]:
        return tuple(self._states)

    @property
    def edges(self) -> tuple[Edge, ...]:
        return tuple(self._edges.values())

    @property
    def implicit_symbols(self) -> bool:
        return not self._params and not self._inputs

    @property
    def parameters(self) -> tuple[Symbol, ...]:
        if self.implicit_symbols:
            names: dict[str, None] = {}
            for e in self._edges.values():
                for s in label_symbols(e.label):
                    names.setdefault(s, None)
            for spec in self._observables.values():  # rate observables' own symbols
                for w in spec.values():
                    if isinstance(w, str) and not any(k in spec for k in OBSERVABLE_KINDS):
                        for s in label_symbols(parse_label(w)):
                            names.setdefault(s, None)
            return tuple(Symbol(n, "parameter") for n in names)
        return tuple(self._params.values())

    @property
    def inputs(self) -> tuple[Symbol, ...]:
        return tuple(self._inputs.values())

    @property
    def symbols(self) -> tuple[str, ...]:
        return tuple(s.name for s in self.parameters + self.inputs)

    def symbol(self, name: str) -> Symbol:
        for s in self.parameters + self.inputs:
            if s.name == name:
                return s
        raise ModelError(f"{self.origin}: unknown symbol {name!r}")

    @property
    def observables(self) -> dict[str, dict]:
        """Observables as declared: name → {state: number or expression text},
        {"flux": "A->B"} or {"net_flux": "A->B"} (see :meth:`observable_terms`)."""
        return {k: dict(v) for k, v in self._observables.items()}

    def index(self) -> dict[str, int]:
        return {s: i for i, s in enumerate(self._states)}

    def edge_list(self) -> list[tuple[int, int]]:
        """Edges as (source index, target index) in insertion order."""
        idx = self.index()
        return [(idx[e.source], idx[e.target]) for e in self._edges.values()]

    # ------------------------------------------------------------ checking
    def validate(self) -> "Scheme":
        """Refuse empty schemes, undeclared symbols and unknown observable states."""
        if not self._edges:
            raise ModelError(f"{self.origin}: empty scheme; it needs at least one edge")
        lookalike_clash(self._states, "state", self.origin)
        used = {s: None for e in self._edges.values() for s in label_symbols(e.label)}
        lookalike_clash(list(dict.fromkeys([*self.symbols, *used])), "symbol", self.origin)
        lookalike_clash(self._observables, "observable", self.origin)
        declared = set(self.symbols)
        for e in self._edges.values():
            for s in label_symbols(e.label):
                if s not in declared:
                    raise ModelError(f"{self.origin}: edge {e.source}->{e.target}: undeclared symbol {s!r} "
                                     f"in rate {e.rate!r}; declare it under [parameters] or [inputs]")
        for obs, terms in self.observable_terms().items():
            for state, label in terms:
                for s in label_symbols(label):
                    if s not in declared:
                        raise ModelError(f"{self.origin}: observable {obs!r}: weight of state {state!r} uses "
                                         f"undeclared symbol {s!r}; declare it under [parameters] or [inputs]")
        return self

    def canonical(self) -> str:
        """A canonical text of the scheme (for content hashes): same scheme, same text."""
        doc = {
            "states": list(self._states),
            "edges": [[e.source, e.target, label_text(e.label)] for e in self._edges.values()],
            "parameters": [[s.name, s.value, s.min, s.max] for s in self.parameters],
            "inputs": [[s.name, s.value, s.min, s.max] for s in self.inputs],
            "observables": {k: sorted(v.items()) for k, v in sorted(self._observables.items())},
        }
        return json.dumps(doc, sort_keys=True, separators=(",", ":"))

    def content_hash(self) -> str:
        return hashlib.sha256(self.canonical().encode()).hexdigest()

    def defaults(self) -> dict[str, float]:
        """Values given in the model, by symbol name (symbols without one are absent)."""
        return {s.name: s.value for s in self.parameters + self.inputs if s.value is not None}
