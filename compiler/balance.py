"""Detailed balance made readable, and the equilibrium restriction of a scheme.

:func:`reduce_conditions` turns the Kolmogorov conditions of the basis cycles
(Π forward labels = Π reverse labels) into the simplest equivalent set: each
ratio is reduced (``cancel``); where every ratio is a monomial
c·Π θ_k^(a_k) — the usual case of mass-action labels — a condition is a
linear equation in log θ (and the logs of the primes of c), so duplicates,
reciprocals and conditions implied by others are removed by row-reducing the
exponent matrix over the rationals, and each remaining row is shown with
positive exponents on both sides (``w = 1``). Otherwise conditions are shown
as ``numerator = denominator`` of the reduced ratio, duplicates dropped.

:func:`equilibrium_restriction` derives the scheme constrained to detailed
balance: a breadth-first spanning tree of the reversible pairs keeps both
rates free; each remaining pair (a chord, one per basis cycle) keeps one rate
free and gets the other from its cycle's Kolmogorov condition, so every
basis cycle — hence every cycle — balances identically.

SymPy is used at this edge only (reading labels, printing conditions and
the restricted rates).
"""

from __future__ import annotations

import math
from fractions import Fraction

from treeflux.runtime import graph

from .errors import ModelError

__all__ = ["reduce_conditions", "equilibrium_restriction"]


def _monomial(expr, symbols):
    """{symbol or prime: Fraction exponent} of c·Π θ^a, or None if not of that form."""
    import sympy

    coeff, rest = expr.as_coeff_Mul()
    vec: dict = {}
    if not coeff.is_Rational or coeff <= 0:
        return None
    for prime, e in sympy.factorint(coeff.p).items():
        vec[("prime", int(prime))] = vec.get(("prime", int(prime)), 0) + Fraction(int(e))
    for prime, e in sympy.factorint(coeff.q).items():
        vec[("prime", int(prime))] = vec.get(("prime", int(prime)), 0) - Fraction(int(e))
    for base, e in rest.as_powers_dict().items():
        if base == 1:
            continue
        if not (base.is_Symbol and e.is_Rational):
            return None
        vec[base] = vec.get(base, 0) + Fraction(int(e.p), int(e.q))
    return {k: v for k, v in vec.items() if v}


def _side(vec: dict, sign: int):
    """Π base^|e| over the entries whose exponent has the given sign."""
    import sympy

    out = sympy.Integer(1)
    for key, e in vec.items():
        if e * sign > 0:
            base = sympy.Integer(key[1]) if isinstance(key, tuple) else key
            out *= base ** sympy.Rational(abs(e.numerator), e.denominator)
    return out


def reduce_conditions(ratios) -> list[tuple]:
    """The simplest equivalent set of conditions ``ratio == 1``, as (lhs, rhs)
    SymPy pairs (lhs = rhs). ``ratios`` are SymPy expressions in positive
    symbols (Π forward / Π reverse of each basis cycle)."""
    import sympy

    reduced = []
    for r in ratios:
        r = sympy.cancel(sympy.powsimp(r, force=True))
        if r != 1:
            reduced.append(r)
    if not reduced:
        return []
    vecs = [_monomial(r, None) for r in reduced]
    if all(v is not None for v in vecs):
        keys = sorted({k for v in vecs for k in v}, key=_key_order)
        M = sympy.Matrix([[sympy.Rational(v.get(k, 0).numerator, v.get(k, 0).denominator) for k in keys]
                          for v in vecs])
        rref, pivots = M.rref()
        out = []
        for i in range(len(pivots)):
            row = rref.row(i)
            den = math.lcm(*[int(x.q) for x in row])
            ints = [int(x * den) for x in row]
            g = math.gcd(*ints) or 1
            vec = {k: Fraction(x // g) for k, x in zip(keys, ints) if x}
            out.append((_side(vec, 1), _side(vec, -1)))
        return out
    seen, out = set(), []
    for r in reduced:
        num, den = sympy.fraction(sympy.factor(r))
        key = frozenset((sympy.srepr(num), sympy.srepr(den)))
        if key not in seen:
            seen.add(key)
            out.append((num, den))
    return out


def _key_order(k):
    return (1, str(k[1]).zfill(12)) if isinstance(k, tuple) else (0, str(k))


def condition_texts(pairs, *, latex: bool = False) -> list[str]:
    import sympy

    show = sympy.latex if latex else sympy.sstr
    return [f"{show(a)} = {show(b)}" for a, b in pairs]


# ---------------------------------------------------------------- the restriction

def equilibrium_restriction(scheme):
    """A new Scheme: same states, edges, symbols and observables, with the rate
    of one direction of each chord pair replaced by the value its basis cycle's
    Kolmogorov condition demands (labels unchanged where the cycle already
    balances identically). Refused for schemes with one-way edges."""
    import sympy

    from .model import Scheme
    from .parse import parse_label
    from .structure import _sympy_label

    scheme.validate()
    present = {(e.source, e.target): e for e in scheme.edges}
    for e in scheme.edges:
        if (e.target, e.source) not in present:
            raise ModelError(f"{scheme.origin}: edge {e.source}->{e.target} has no reverse edge; "
                             "the equilibrium restriction needs every transition to be reversible")
    states = scheme.states
    n = len(states)
    syms: dict = {}
    label = {(states.index(e.source), states.index(e.target)): _sympy_label(e.label, syms)
             for e in scheme.edges}
    fixed = {}
    for cycle, (u, v) in graph.fundamental_cycles(n, list(label)):
        ring = list(zip(cycle, cycle[1:] + cycle[:1]))
        # the cycle is traversed in list order; it contains the chord as u->v or v->u
        chord = (u, v) if (u, v) in ring else (v, u)
        a, b = chord
        forward = sympy.Mul(*[label[(x, y)] for x, y in ring])
        reverse_rest = sympy.Mul(*[label[(y, x)] for x, y in ring if (x, y) != chord])
        value = sympy.factor(sympy.cancel(forward / reverse_rest))
        if sympy.cancel(value / label[(b, a)]) != 1:
            fixed[(b, a)] = value
    out = Scheme(name=f"{scheme.name} (equilibrium restriction)", origin=scheme.origin)
    for s in scheme.parameters:
        out.add_parameter(s.name, value=s.value, min=s.min, max=s.max)
    for s in scheme.inputs:
        out.add_input(s.name, value=s.value, min=s.min, max=s.max)
    for st in states:
        out.add_state(st)
    for e in scheme.edges:
        key = (states.index(e.source), states.index(e.target))
        if key in fixed:
            text = sympy.sstr(fixed[key])
            parse_label(text, where=f"{scheme.origin}: restricted edge {e.source}->{e.target}")
            out.add_edge(e.source, e.target, text)
        else:
            out.add_edge(e.source, e.target, e.rate)
    for name, weights in scheme.observables.items():
        out.add_observable(name, weights)
    out.validate()
    out.restricted_edges = [f"{states[b]}->{states[a]}" for (b, a) in fixed]
    return out
