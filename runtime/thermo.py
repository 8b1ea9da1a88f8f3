"""Thermodynamics of the steady state: fluxes, cycle affinities, entropy production.

With steady-state probabilities p and edge labels ℓ (transition rates):

- one-way flux of edge i→j: p_i ℓ(i→j); net flux of a reversible pair
  J(i→j) = p_i ℓ(i→j) − p_j ℓ(j→i). At steady state the net fluxes obey
  Kirchhoff's current law at every state (inflow = outflow).
- affinity of a cycle C (traversed in its listed direction):
  A(C) = ln(Π_{edges of C} ℓ(forward) / Π ℓ(reverse)); it is +∞ when a
  reverse transition is missing, −∞ when a forward one is.
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

References
----------
.. [1] J. Schnakenberg, "Network theory of microscopic and macroscopic
   behavior of master equation systems", Rev. Mod. Phys. 48 (1976) 571–585.
.. [2] A. Kolmogoroff, "Zur Theorie der Markoffschen Ketten", Math. Ann. 112
   (1936) 155–160.
"""

from __future__ import annotations

import math

import numpy as np

from .errors import EvaluationError
from .graph import fundamental_cycles

__all__ = ["thermodynamics", "fundamental_cycles"]


def _log(x: float) -> float:
    return math.log(x) if x > 0 else -math.inf


def thermodynamics(model, values=None, *, cycles=None, tolerance: float | None = None) -> dict:
    """Net fluxes, cycle affinities and entropy production at one set of values.

    Parameters
    ----------
    model : CompiledModel
        Must have a unique steady state.
    values : dict or array, optional
        One set of symbol values (missing names take the model's values).
    cycles : list of lists of state indices, optional
        Cycles to report affinities for (each traversed in list order and
        closed back to its first state). Default: :func:`fundamental_cycles`
        of the scheme.
    tolerance : float, optional
        Largest |affinity| taken as zero in the numeric detailed-balance
        check. Default: 64 ε Σ(1 + |ln ℓ|) over the cycle's labels, a bound
        on the rounding of the log sums.

    Returns
    -------
    dict
        ``probabilities`` (state → p), ``fluxes`` ("A->B" → net flux per
        reversible pair, oriented as the edge listed first; one-way flux
        p_i ℓ(i→j) per one-way edge), ``one_way_edges``, ``affinities``
        (list of {``states``, ``affinity``, ``cycle_flux``} with ``affinity``
        None and a ``note`` when infinite), ``entropy_production`` (σ, k_B per
        unit time; None with ``entropy_production_note`` when infinite),
        ``entropy_production_reversible_part`` (the finite sum over
        reversible pairs), ``entropy_production_cycles`` (Σ_C J_C A(C), the
        same number by Schnakenberg's network theorem, when every cycle
        affinity is finite), ``detailed_balance`` ({``holds``,
        ``max_abs_affinity``, ``reason``}), ``units`` and ``note``.
    """
    X = model.as_array(values if values is not None else {})
    if X.shape[0] != 1:
        raise EvaluationError(f"thermodynamics takes one set of values, got {X.shape[0]}")
    states = list(model.states)
    n = len(states)
    edges = [tuple(e) for e in model.info.edges]
    p = model.steady_state(X)[0]
    rates = model.labels(X)[0]
    rate = {e: float(r) for e, r in zip(edges, rates)}
    name = lambda i, j: f"{states[i]}->{states[j]}"     # noqa: E731

    fluxes: dict = {}
    one_way = []
    net = np.zeros((n, n))          # net[i, j] = net flux i→j (antisymmetric)
    sigma_rev = 0.0
    infinite = []
    seen = set()
    for (i, j) in edges:
        if (i, j) in seen:
            continue
        fwd = p[i] * rate[(i, j)]
        if (j, i) in rate:
            seen.add((j, i))
            bwd = p[j] * rate[(j, i)]
            J = float(fwd - bwd)
            fluxes[name(i, j)] = J
            if fwd > 0 and bwd > 0:
                # ln(p_i ℓ_ij / p_j ℓ_ji) from logs: no overflow, no cancellation in the ratio
                x = (math.log(p[i]) + math.log(rate[(i, j)])) - (math.log(p[j]) + math.log(rate[(j, i)]))
                sigma_rev += J * x
            elif fwd > 0 or bwd > 0:
                infinite.append(name(i, j) if fwd > 0 else name(j, i))
        else:
            J = float(fwd)
            fluxes[name(i, j)] = J
            one_way.append(name(i, j))
            if fwd > 0:
                infinite.append(name(i, j))
        net[i, j] += J
        net[j, i] -= J
        seen.add((i, j))

    if cycles is None:
        basis = fundamental_cycles(n, edges)
    else:
        basis = [(list(c), None) for c in cycles]
    affinities = []
    finite_all = True
    sigma_cycles = 0.0
    max_abs = 0.0
    holds = not one_way
    for cyc, chord in basis:
        ring = list(zip(cyc, cyc[1:] + cyc[:1]))
        log_f = sum(_log(rate.get((a, b), 0.0)) for a, b in ring)
        log_r = sum(_log(rate.get((b, a), 0.0)) for a, b in ring)
        entry = {"states": [states[s] for s in cyc]}
        if chord is not None:
            u, v = chord
            # the chord is traversed u→v along the cycle (u, v adjacent in list order)
            entry["cycle_flux"] = float(net[u, v])
        if math.isinf(log_f) or math.isinf(log_r):
            finite_all = False
            holds = False
            missing_f = [name(a, b) for a, b in ring if (a, b) not in rate]
            missing_r = [name(b, a) for a, b in ring if (b, a) not in rate]
            if missing_f and missing_r:
                entry["affinity"] = None
                entry["note"] = "undefined: transitions missing in both directions"
            elif missing_r:
                entry["affinity"] = None
                entry["note"] = f"+inf: reverse transitions {', '.join(missing_r)} are missing"
            else:
                entry["affinity"] = None
                entry["note"] = f"-inf: forward transitions {', '.join(missing_f)} are missing"
        else:
            A = log_f - log_r
            entry["affinity"] = float(A)
            scale = sum(1.0 + abs(math.log(rate[(a, b)])) + abs(math.log(rate[(b, a)])) for a, b in ring)
            tol = tolerance if tolerance is not None else 64 * np.finfo(float).eps * scale
            max_abs = max(max_abs, abs(A))
            if abs(A) > tol:
                holds = False
            if "cycle_flux" in entry:
                sigma_cycles += entry["cycle_flux"] * A
        affinities.append(entry)

    result = {
        "values": dict(zip(model.symbols, X[0].tolist())),
        "probabilities": dict(zip(states, p.tolist())),
        "fluxes": fluxes,
        "one_way_edges": one_way,
        "affinities": affinities,
        "entropy_production_reversible_part": float(sigma_rev),
        "units": "entropy production in k_B per unit time (the time unit of the rates)",
        "note": "model predictions of the scheme, not measurements",
    }
    if infinite:
        result["entropy_production"] = None
        result["entropy_production_note"] = (
            f"infinite: {', '.join(infinite[:5])}{' ...' if len(infinite) > 5 else ''} "
            f"carry flux with no reverse transition")
    else:
        result["entropy_production"] = float(sigma_rev)
    if finite_all and cycles is None:
        result["entropy_production_cycles"] = float(sigma_cycles)
    if one_way:
        reason = f"one-way edges ({', '.join(one_way[:3])}{' ...' if len(one_way) > 3 else ''}) break detailed balance"
    elif not affinities:
        reason = "reversible without cycles: detailed balance holds"
    elif holds:
        reason = f"every basis-cycle affinity vanishes (largest |A| = {max_abs:.3g})"
    else:
        reason = f"a basis cycle has a non-zero affinity (largest |A| = {max_abs:.3g})"
    result["detailed_balance"] = {"holds": bool(holds), "max_abs_affinity": max_abs, "reason": reason}
    return result
