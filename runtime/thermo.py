"""Thermodynamics of the steady state: fluxes, cycle affinities, entropy production.

With steady-state probabilities p and edge labels ℓ (transition rates):

- one-way flux of edge i→j: p_i ℓ(i→j); net flux of a reversible pair
  J(i→j) = p_i ℓ(i→j) − p_j ℓ(j→i). At steady state the net fluxes obey
  Kirchhoff's current law at every state (inflow = outflow).
- affinity of a cycle C (traversed in its listed direction):
  A(C) = ln(Π_{edges of C} ℓ(forward) / Π ℓ(reverse)); it is +∞ when a
  reverse transition is absent (missing, or a zero rate at the given
  values, e.g. a zero concentration), −∞ when a forward one is.
- entropy production rate (Schnakenberg [1]_), in units of k_B per unit
  time (the time unit of the rates):
  σ = ½ Σ_{i≠j} J(i→j) ln(p_i ℓ(i→j) / (p_j ℓ(j→i))) ≥ 0,
  zero iff detailed balance holds. A one-way edge carrying flux makes σ
  infinite. Since the net fluxes form a circulation, J decomposes on the
  fundamental cycles of a spanning tree with the net flux of each cycle's
  chord as coefficient, and σ = Σ_C J_C A(C) (Schnakenberg's network
  theorem, [1]_ §V).

Detailed balance at given values (Kolmogorov's criterion [2]_): every
affinity of a cycle basis vanishes (checked to a rounding tolerance).

Accuracy. Near balance the two products p_i ℓ(i→j) and p_j ℓ(j→i) agree
to many digits and a floating-point difference keeps none of them. Every
float is a dyadic rational, so the steady state of the evaluated rates is
computed here exactly, in rational arithmetic (state reduction with
Fractions: ρ_i are polynomials in the rates, nothing is rounded). Each net
flux is then the exactly rounded value of the true one, a single cycle's
pairs carry bit-identical fluxes, each pair's term J·ln(a/b) is formed
from one exact a − b (so it is ≥ 0, and 0 exactly when a = b), and
``entropy_production_error`` is a proven bound on the remaining rounding:
≤ 2u per term from the flux and product, the logarithm's bound
(:func:`_ln_ratio`, which takes the C library's log and log1p to be within
one ulp), and u σ for the correctly rounded sum (math.fsum).
Rounding in the evaluation of the rates themselves is outside the bound (the
rates are taken as given). Schemes whose rational elimination would be too
costly (EXACT_WORK_LIMIT) fall back to the float steady state and say so
(``exact_fluxes`` false, error bound None).

References
----------
.. [1] J. Schnakenberg, "Network theory of microscopic and macroscopic
   behavior of master equation systems", Rev. Mod. Phys. 48 (1976) 571–585.
.. [2] A. Kolmogoroff, "Zur Theorie der Markoffschen Ketten", Math. Ann. 112
   (1936) 155–160.
"""

from __future__ import annotations

import math
from fractions import Fraction


from .errors import EvaluationError
from .graph import fundamental_cycles, terminal_components
from .passage import checked_rates

__all__ = ["thermodynamics", "fundamental_cycles", "exact_steady_state"]

_U = 2.0 ** -53                 # unit roundoff of float64
_TINY = 2.0 ** -1074            # absolute error of a result rounded into the subnormal range
EXACT_WORK_LIMIT = 4_000_000    # rational elimination beyond this (≈ 10 s) falls back to floats


# ------------------------------------------------------------------ exact steady state

def _order(n: int, edges) -> tuple[list[int], int]:
    """Elimination order (fewest in-links × out-links first, all but the last
    state) and a cost estimate: Σ links × step, the growth of the rationals'
    size being roughly linear in the step."""
    out = [set() for _ in range(n)]
    inn = [set() for _ in range(n)]
    for i, j in edges:
        out[i].add(j)
        inn[j].add(i)
    alive = set(range(n))
    order, work = [], 0
    for step in range(n - 1):
        k = min(alive, key=lambda k: (len(inn[k]) * len(out[k]), k))
        alive.discard(k)
        order.append(k)
        work += (len(inn[k]) * len(out[k]) + 1) * (step + 1)
        for i in inn[k]:
            out[i].discard(k)
            out[i] |= out[k] - {i}
        for j in out[k]:
            inn[j].discard(k)
            inn[j] |= inn[k] - {j}
    return order, work


def exact_steady_state(n: int, edges, rates, order=None) -> list[Fraction]:
    """Steady state of a strongly connected scheme in exact rational
    arithmetic (every float is a dyadic rational, so nothing is rounded):
    state reduction (Grassmann–Taksar–Heyman) with Fractions. Rates must be
    positive. Returns p as Fractions summing to 1."""
    if order is None:
        order = _order(n, edges)[0]
    out = [dict() for _ in range(n)]
    for (i, j), v in zip(edges, rates):
        out[i][j] = out[i].get(j, 0) + Fraction(v)
    inn = [set() for _ in range(n)]
    for i in range(n):
        for j in out[i]:
            inn[j].add(i)
    saved = []
    for k in order:
        R_k = sum(out[k].values())
        preds = inn[k] - {k}
        saved.append((k, R_k, {i: out[i][k] for i in preds}))
        for i in preds:
            f = out[i].pop(k) / R_k
            for j, v in out[k].items():
                if j != i:
                    out[i][j] = out[i].get(j, 0) + f * v
                    inn[j].add(i)
        for j in out[k]:
            inn[j].discard(k)
        out[k] = {}
    root = (set(range(n)) - set(order)).pop()
    rho = [Fraction(0)] * n
    rho[root] = Fraction(1)
    for k, R_k, into in reversed(saved):
        rho[k] = sum(rho[i] * v for i, v in into.items()) / R_k
    total = sum(rho)
    return [r / total for r in rho]


def _ln_ratio(a: Fraction, b: Fraction) -> tuple[float, float]:
    """ln(a/b) for exact positive a, b, and a bound on its absolute error.

    Near 1 it is log1p of the exactly formed x = (a − b)/b: rounding x costs
    at most 2u relative for |x| ≤ ½ (|log1p(x)| ≥ |x|/(1 + |x|) for x > 0,
    ≥ |x| for x < 0), the library's result at most 1 ulp (≤ 2u; glibc's
    documented maximum for log and log1p); the bound allows 6u. Otherwise log of
    the correctly rounded ratio (absolute error ≤ u from the argument, plus
    the last bit), and for ratios beyond float range the difference of the
    integer logs (each within a few ulp of its own size)."""
    q = Fraction(a) / Fraction(b)
    x = q - 1
    if abs(x) <= Fraction(1, 2):
        L = math.log1p(float(x))
        return L, 6 * _U * abs(L)
    if Fraction(2.0 ** -1000) < q < Fraction(2.0 ** 1000):
        L = math.log(float(q))
        return L, 4 * _U * abs(L) + 1.01 * _U
    ln_n, ln_d = math.log(q.numerator), math.log(q.denominator)
    L = ln_n - ln_d
    return L, 4 * _U * (abs(ln_n) + abs(ln_d)) + 2 * _U * abs(L)


# ------------------------------------------------------------------ the analysis

def _steady_state(model, X, states, edges, rates):
    """(p as exact Fractions or floats, exact?) on the graph of positive rates."""
    n = len(states)
    live = [e for e, r in zip(edges, rates) if r > 0]
    comps = terminal_components(n, live)
    if len(comps) != 1:
        absent = [f"{states[i]}->{states[j]}" for (i, j), r in zip(edges, rates) if r == 0]
        names = "; ".join("{" + ", ".join(states[s] for s in c) + "}" for c in comps)
        msg = f"the scheme has {len(comps)} terminal components ({names}), so its steady state is not unique"
        if absent:
            msg = f"with a zero rate on {', '.join(absent[:4])}{' ...' if len(absent) > 4 else ''}, " + msg
        raise EvaluationError(msg)
    comp = comps[0]
    local = {s: a for a, s in enumerate(comp)}
    sub = [(k, (local[i], local[j])) for k, ((i, j), r) in enumerate(zip(edges, rates))
           if r > 0 and i in local and j in local]
    p = [Fraction(0)] * n
    if len(comp) == 1:
        p[comp[0]] = Fraction(1)
        return p, True
    if len(comp) <= 2000:
        order, work = _order(len(comp), [e for _, e in sub])
        if work <= EXACT_WORK_LIMIT:
            q = exact_steady_state(len(comp), [e for _, e in sub], [rates[k] for k, _ in sub], order)
            for s, v in zip(comp, q):
                p[s] = v
            return p, True
    return [float(v) for v in model.steady_state(X)[0]], False


def _exact(x: float, exact: bool):
    """A rate as an exact Fraction on the exact path (Fraction × float would round)."""
    return Fraction(x) if exact else x


def _name(states, i, j):
    return f"{states[i]}->{states[j]}"


def _pairs(edges):
    """Reversible pairs (i, j) oriented as the edge listed first, and one-way edges."""
    present = set(edges)
    pairs, one_way, seen = [], [], set()
    for (i, j) in edges:
        if (i, j) in seen:
            continue
        seen.add((i, j))
        if (j, i) in present:
            seen.add((j, i))
            pairs.append((i, j))
        else:
            one_way.append((i, j))
    return pairs, one_way


def _flux_terms(states, p, rate, pairs, one_way_struct, balanced, exact):
    """Net fluxes (exact where p is), σ terms with error bounds, one-way edges."""
    fluxes, net = {}, {}
    one_way, infinite = [], []
    terms, errors = [], []
    for (i, j) in pairs + one_way_struct:
        a = p[i] * _exact(rate[(i, j)], exact)
        b = p[j] * _exact(rate.get((j, i), 0.0), exact)
        J = 0 if (balanced and rate[(i, j)] > 0 and rate.get((j, i), 0) > 0) else a - b
        net[(i, j)] = J
        net[(j, i)] = -J
        fluxes[_name(states, i, j)] = float(J)
        lf, lb = rate[(i, j)] > 0, rate.get((j, i), 0.0) > 0
        if lf != lb:                                   # one-way at these values
            src, dst = (i, j) if lf else (j, i)
            one_way.append(_name(states, src, dst))
            if p[src] > 0:
                infinite.append(_name(states, src, dst))
        elif lf and a > 0 and J != 0:
            L, eL = _ln_ratio(a, b)
            Jf = float(J)
            t = Jf * L                                 # J and ln(a/b) share the sign of a − b: t ≥ 0
            terms.append(t)
            errors.append(2.0001 * _U * t + abs(Jf) * eL * (1 + 4 * _U) + 2 * _TINY)
    return fluxes, net, one_way, infinite, terms, errors


def _cycle_entry(states, cyc, chord, rate, net, tolerance, balanced):
    ring = list(zip(cyc, cyc[1:] + cyc[:1]))
    fwd = [rate.get((a, b), 0.0) for a, b in ring]
    rev = [rate.get((b, a), 0.0) for a, b in ring]
    entry = {"states": [states[s] for s in cyc]}
    flux = None
    if chord is not None:
        flux = net.get(chord, 0)
        entry["cycle_flux"] = float(flux)      # the chord u→v, traversed along the cycle
    miss_f = [_name(states, a, b) for (a, b), r in zip(ring, fwd) if r == 0]
    miss_r = [_name(states, b, a) for (a, b), r in zip(ring, rev) if r == 0]
    if miss_f or miss_r:
        entry["affinity"] = None
        if miss_f and miss_r:
            entry["affinity_limit"] = "undefined"
            entry["note"] = (f"undefined: {', '.join(miss_f)} and {', '.join(miss_r)} are absent "
                             "(no transition or zero rate at these values); no flux can circulate")
        elif miss_r:
            entry["affinity_limit"] = "+inf"
            entry["note"] = f"+inf: reverse transitions {', '.join(miss_r)} are absent at these values"
        else:
            entry["affinity_limit"] = "-inf"
            entry["note"] = f"-inf: forward transitions {', '.join(miss_f)} are absent at these values"
        return entry, flux, None, None, False
    A, eA = _ln_ratio(math.prod(map(Fraction, fwd)), math.prod(map(Fraction, rev)))
    # numeric detailed-balance tolerance: the rounding of the evaluated rates (≤ a few ulp each)
    scale = sum(1.0 + abs(math.log(f)) + abs(math.log(r)) for f, r in zip(fwd, rev))
    tol = tolerance if tolerance is not None else 64 * _U * scale
    if balanced:
        A, eA = 0.0, 0.0
    entry["affinity"] = float(A)
    return entry, flux, A, eA, abs(A) <= tol


def thermodynamics(model, values=None, *, cycles=None, tolerance: float | None = None,
                   balanced: bool | None = None) -> dict:
    """Net fluxes, cycle affinities and entropy production at one set of values.

    Parameters
    ----------
    model : CompiledModel
        Must have a unique steady state at these values.
    values : dict or array, optional
        One set of symbol values (missing names take the model's values).
    cycles : list of lists of state indices, optional
        Cycles to report affinities for (each traversed in list order and
        closed back to its first state). Default: :func:`fundamental_cycles`
        of the scheme.
    tolerance : float, optional
        Largest |affinity| taken as zero in the numeric detailed-balance
        check. Default: 64 u Σ(1 + |ln ℓ|) over the cycle's labels, a bound
        on the effect of rounding the evaluated rates.
    balanced : bool, optional
        True when detailed balance holds identically (for every parameter
        value; the compiler's structural verdict): reversible pairs then
        carry exactly zero net flux and σ is exactly 0, whatever the
        rounding of the evaluated rates. Default: True for models compiled
        with the equilibrium method (which requires it), else False.

    Returns
    -------
    dict
        ``probabilities``, ``fluxes`` ("A->B" → net flux per reversible
        pair, oriented as the edge listed first; one-way flux p_i ℓ(i→j) per
        one-way edge), ``one_way_edges`` (one-way at these values: no
        reverse transition, or a zero reverse rate), ``absent_edges`` (zero
        rate), ``affinities`` (list of {``states``, ``affinity``,
        ``cycle_flux``}; ``affinity`` None with ``affinity_limit`` "+inf",
        "-inf" or "undefined" and a ``note`` when a direction is absent),
        ``entropy_production`` (σ, k_B per unit time; None with
        ``entropy_production_note`` when infinite) and
        ``entropy_production_error`` (a proven bound on |σ − σ_exact| for the
        evaluated rates; None when the scheme was too large for the exact
        path), ``entropy_production_reversible_part``,
        ``entropy_production_cycles`` (Σ_C J_C A(C) over the basis, when
        every affinity is finite) with ``entropy_production_cycles_error``,
        ``detailed_balance`` ({``holds``, ``max_abs_affinity``, ``reason``}),
        ``exact_fluxes``, ``units`` and ``note``.
    """
    X = model.as_array(values if values is not None else {})
    if X.shape[0] != 1:
        raise EvaluationError(f"thermodynamics takes one set of values, got {X.shape[0]}")
    if balanced is None:
        balanced = getattr(model.info, "method", "") == "equilibrium"
    states = list(model.states)
    n = len(states)
    edges = [tuple(e) for e in model.info.edges]
    rates = checked_rates(model.labels(X), edges, states)[0].tolist()
    rate = dict(zip(edges, rates))
    p, exact = _steady_state(model, X, states, edges, rates)
    pairs, one_way_struct = _pairs(edges)
    fluxes, net, one_way, infinite, terms, errors = _flux_terms(
        states, p, rate, pairs, one_way_struct, balanced, exact)

    basis = fundamental_cycles(n, edges) if cycles is None else [(list(c), None) for c in cycles]
    affinities, cyc_terms, cyc_errors = [], [], []
    finite_all, small_all, max_abs = True, True, 0.0
    for cyc, chord in basis:
        entry, flux, A, eA, small = _cycle_entry(states, cyc, chord, rate, net, tolerance, balanced)
        affinities.append(entry)
        if A is None:
            finite_all = False
            continue
        small_all &= small
        max_abs = max(max_abs, abs(A))
        if flux is not None:
            Jf = float(flux)
            cyc_terms.append(Jf * A)
            cyc_errors.append(2.0001 * _U * abs(Jf * A) + abs(Jf) * eA * (1 + 4 * _U) + 2 * _TINY)

    sigma = math.fsum(terms)
    sigma_err = (math.fsum(errors) + _U * sigma) * (1 + 8 * _U) if exact else None
    result = {
        "values": dict(zip(model.symbols, X[0].tolist())),
        "probabilities": dict(zip(states, [float(v) for v in p])),
        "fluxes": fluxes,
        "one_way_edges": one_way,
        "absent_edges": [_name(states, i, j) for (i, j), r in zip(edges, rates) if r == 0],
        "affinities": affinities,
        "entropy_production_reversible_part": sigma,
        "exact_fluxes": exact,
        "units": "entropy production in k_B per unit time (the time unit of the rates)",
        "note": "model predictions of the scheme, not measurements",
    }
    if infinite:
        result["entropy_production"] = None
        result["entropy_production_error"] = None
        result["entropy_production_note"] = (
            f"infinite: {', '.join(infinite[:5])}{' ...' if len(infinite) > 5 else ''} "
            f"{'carries' if len(infinite) == 1 else 'carry'} flux with no reverse transition")
    else:
        result["entropy_production"] = sigma
        result["entropy_production_error"] = sigma_err
    if exact:
        result["error_note"] = ("fluxes are the exactly rounded values for the evaluated rates (exact "
                                "rational steady state); entropy_production_error bounds |σ − σ_exact| "
                                "(rounding of the rates themselves not included)")
    else:
        result["error_note"] = ("scheme too large for the exact rational path: fluxes by floating-point "
                                "subtraction, no error bound; near detailed balance σ may be rounding noise")
    if finite_all and cycles is None:
        sc = math.fsum(cyc_terms)
        result["entropy_production_cycles"] = sc
        result["entropy_production_cycles_error"] = (
            (math.fsum(cyc_errors) + _U * math.fsum(map(abs, cyc_terms))) * (1 + 8 * _U) if exact else None)
    result["detailed_balance"] = _balance_verdict(affinities, one_way, infinite, finite_all,
                                                  small_all, max_abs, balanced)
    return result


def _balance_verdict(affinities, one_way, infinite, finite_all, small_all, max_abs, balanced):
    """Detailed balance at these values: no net flux anywhere. One-way edges
    carrying flux and basis cycles with a non-zero (or infinite) affinity
    break it; the reason always names what decided."""
    inf_cycles = [a for a in affinities if a["affinity"] is None]
    if infinite:
        holds = False
        reason = (f"one-way edges carrying flux ({', '.join(infinite[:3])}"
                  f"{' ...' if len(infinite) > 3 else ''}) break detailed balance")
    elif not small_all:
        holds = False
        reason = f"a basis cycle has a non-zero affinity (largest |A| = {max_abs:.3g})"
    elif inf_cycles:
        holds = False
        reason = (f"{len(inf_cycles)} basis cycle(s) have an infinite or undefined affinity "
                  f"({inf_cycles[0]['note']})")
    elif balanced:
        holds = True
        reason = "detailed balance holds identically (for every parameter value)"
    elif not affinities:
        holds = not one_way
        reason = ("reversible without cycles: detailed balance holds" if holds else
                  f"one-way edges ({', '.join(one_way[:3])}) break detailed balance")
    else:
        holds = True
        reason = (f"every basis-cycle affinity vanishes within the rounding of the rates "
                  f"(largest |A| = {max_abs:.3g})")
    return {"holds": bool(holds), "max_abs_affinity": max_abs if finite_all else None,
            "reason": reason}
