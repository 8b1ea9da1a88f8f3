"""Mean first-passage times and splitting (absorption) probabilities by
subtraction-free state reduction.

The mean time τ_i to reach a target set T from state i solves
Σ_j ℓ(i→j)(τ_j − τ_i) = −1 for i ∉ T, τ_i = 0 on T, and the probability
h_i^g of reaching the target group g before any other group solves
Σ_j ℓ(i→j)(h_j − h_i) = 0 with h = 1 on g, 0 on the other groups: linear
systems on the Laplacian with the targets absorbing (equivalently, by the
matrix-forest theorem, ratios of forest sums [2]_). Solving them by
Gaussian elimination subtracts; eliminating states one at a time the way
Grassmann, Taksar and Heyman [1]_ compute steady states does not.

Each remaining state i carries out-rates r(i→j) (j ≠ i), their sum
R_i = Σ_j r(i→j), and a time weight T_i, with τ-contribution per visit
T_i / R_i (initially r = ℓ, T_i = 1). Removing a state k (neither the
source nor absorbing) censors the chain on the others:

    r(i→j) += r(i→k) r(k→j) / R_k      (j ≠ i; returns i→k→i are dropped)
    T_i    += r(i→k) T_k / R_k
    R_i     = Σ_j r(i→j)               (a sum of positive terms)

because the excursion through k costs T_k/R_k per visit to k and the
dropped self-loops only lengthen the current sojourn (the geometric number
of returns cancels against the smaller exit rate). When only the source s
and the absorbing groups remain, τ_s = T_s / Σ_g r(s→g) and the splitting
probability into g is r(s→g) / Σ_g' r(s→g'). Every operation adds,
multiplies or divides positive numbers, so the results keep a small
entrywise relative error however the rates are spread — small splitting
probabilities included (O'Cinneide [3]_ for the same argument on steady
states).

States from which no target can be reached form one more absorbing group,
"never": when the chain can enter it the mean time is infinite and its
splitting probability is the chance of never reaching a target.

A zero rate (an input concentration of zero) is an absent edge; rows are
solved one pattern of zeros at a time.

References
----------
.. [1] W. K. Grassmann, M. I. Taksar, D. P. Heyman, "Regenerative analysis
   and steady state distributions for Markov chains", Oper. Res. 33 (1985)
   1107–1116.
.. [2] P. Chebotarev, E. Shamis, "The matrix-forest theorem and measuring
   relations in small social groups", Autom. Remote Control 58 (1997)
   1505–1514.
.. [3] C. A. O'Cinneide, "Entrywise perturbation theory and error analysis
   for Markov chains", Numer. Math. 65 (1993) 109–120.
"""

from __future__ import annotations

from collections import deque

import numpy as np

from .errors import EvaluationError
from .graph import terminal_components

__all__ = ["mean_first_passage", "passage_times", "absorption", "absorption_probabilities",
           "checked_rates"]


def _edge_name(states, edge) -> str:
    i, j = edge
    return f"{states[i]}->{states[j]}" if states is not None else f"{i}->{j}"


def checked_rates(rates, edges, states=None) -> np.ndarray:
    """Rates as an (N, m) float array; refuses a negative or non-finite rate
    with a one-line message naming the edge by its state names. Zero rates
    (a concentration of zero) are allowed: the edge is absent."""
    rates = np.atleast_2d(np.asarray(rates, dtype=np.float64))
    if rates.shape[1] != len(edges):
        raise EvaluationError(f"expected {len(edges)} rates per row, got {rates.shape[1]}")
    bad = ~(rates >= 0) | ~np.isfinite(rates)
    if bad.any():
        r, e = (int(x) for x in np.argwhere(bad)[0])
        raise EvaluationError(f"row {r}: the rate of edge {_edge_name(states, edges[e])} evaluates to "
                              f"{float(rates[r, e])!r}; rates must be positive and finite")
    return rates


def _reach(succ, starts, blocked):
    seen = set(starts)
    queue = deque(starts)
    while queue:
        a = queue.popleft()
        if a in blocked:
            continue
        for b in succ[a]:
            if b not in seen:
                seen.add(b)
                queue.append(b)
    return seen


def _reduce(n, edges, rates, source, groups):
    """State reduction for one pattern of positive rates (every rate > 0).

    Returns (T_s (N,), exits (N, len(groups) + 1), trapped): exit rates of the
    reduced source into each group and, last, into the states from which no
    group can be reached (``trapped``, sorted)."""
    N = rates.shape[0]
    owner = {}
    for g, members in enumerate(groups):
        for t in members:
            owner[t] = g
    succ = [set() for _ in range(n)]
    pred = [set() for _ in range(n)]
    for i, j in edges:
        succ[i].add(j)
        pred[j].add(i)
    visit = _reach(succ, [source], set(owner))
    can = _reach(pred, list(owner), set())
    trapped = sorted(s for s in visit if s not in can)
    never = len(groups)
    if source in trapped:                                  # no target reachable at all
        exits = np.zeros((N, never + 1))
        exits[:, never] = 1.0
        return np.ones(N), exits, trapped
    for t in trapped:
        owner[t] = never
    keep = sorted(s for s in visit if s not in owner)      # transient states, source included
    pos = {s: k for k, s in enumerate(keep)}
    nk = len(keep)
    r = np.zeros((N, nk, nk + never + 1))                  # columns: transient states, then groups
    for col, (i, j) in enumerate(edges):
        if i in pos:
            c = pos[j] if j in pos else (nk + owner[j] if j in owner else None)
            if c is not None:
                r[:, pos[i], c] += rates[:, col]
    T = np.ones((N, nk))
    s = pos[source]
    todo = [k for k in range(nk) if k != s]
    alive = np.ones(nk, dtype=bool)
    idx = np.arange(nk)
    while todo:
        # fewest links first (structure only: every row has the same positive edges)
        k = min(todo, key=lambda k: (int(np.count_nonzero(r[0, alive, k]))
                                     * int(np.count_nonzero(r[0, k, :])), k))
        todo.remove(k)
        alive[k] = False
        R_k = r[:, k, :].sum(axis=1)                       # k's row holds no self-loop
        into = r[:, :, k].copy()                           # r(i→k), i transient
        into[:, k] = 0.0
        scale = into / R_k[:, None]                        # r(i→k)/R_k
        r += scale[:, :, None] * r[:, k, None, :]
        T += scale * T[:, k, None]
        r[:, :, k] = 0.0
        r[:, k, :] = 0.0
        T[:, k] = 0.0
        r[:, idx, idx] = 0.0                               # drop the i→k→i returns
    return T[:, s], r[:, s, nk:], trapped


def _solve(n, edges, rates, source, groups):
    """Per pattern of zero rates: (times (N,), probabilities (N, G + 1), trapped per row)."""
    N = rates.shape[0]
    G = len(groups)
    times = np.zeros(N)
    probs = np.zeros((N, G + 1))
    trapped = [[] for _ in range(N)]
    for g, members in enumerate(groups):
        if source in members:
            probs[:, g] = 1.0
            return times, probs, trapped
    zero = rates == 0
    for pattern in np.unique(zero, axis=0):
        rows = np.flatnonzero((zero == pattern).all(axis=1))
        live = np.flatnonzero(~pattern)
        sub_edges = [edges[e] for e in live]
        T_s, exits, trap = _reduce(n, sub_edges, rates[np.ix_(rows, live)], source, groups)
        total = exits.sum(axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            times[rows] = np.where(exits[:, G] > 0, np.inf, T_s / total)
            probs[rows] = exits / total[:, None]
        for a, r in enumerate(rows):
            trapped[r] = trap if exits[a, G] > 0 else []
    return times, probs, trapped


def passage_times(n: int, edges, rates: np.ndarray, *, source: int, targets) -> np.ndarray:
    """Mean first-passage times from ``source`` to the set ``targets``.

    Parameters
    ----------
    n : int
        Number of states.
    edges : sequence of (i, j)
        Edge list, in the column order of ``rates``.
    rates : (N, m) or (m,) array
        Edge rates, one row per parameter set; positive, or zero for an
        absent edge.
    source : int
    targets : iterable of int

    Returns
    -------
    (N,) array
        Mean times; ``inf`` where the chain can stay away from the targets
        forever, 0 when the source is a target.
    """
    edges = [tuple(e) for e in edges]
    rates = checked_rates(rates, edges)
    return _solve(n, edges, rates, int(source), [sorted(set(int(t) for t in targets))])[0]


def absorption(n: int, edges, rates: np.ndarray, *, source: int, groups) -> np.ndarray:
    """Splitting probabilities from ``source`` into disjoint absorbing groups.

    Returns an (N, len(groups) + 1) array: the probability that the chain
    started in ``source`` reaches group g before every other group, and,
    last, the probability of reaching none (being trapped where no group is
    reachable). Rows sum to 1 up to rounding; every entry has a small
    relative error (subtraction-free reduction)."""
    edges = [tuple(e) for e in edges]
    rates = checked_rates(rates, edges)
    groups = _disjoint(groups)
    return _solve(n, edges, rates, int(source), groups)[1]


def _disjoint(groups):
    out, seen = [], set()
    for g in groups:
        members = sorted(set(int(t) for t in g))
        if not members:
            raise EvaluationError("an absorbing group is empty")
        if seen & set(members):
            raise EvaluationError(f"state {sorted(seen & set(members))[0]} is in two target groups")
        seen |= set(members)
        out.append(members)
    return out


# ------------------------------------------------------------------ model-level API

def _indices(states, names, what):
    for s in names:
        if s not in states:
            raise EvaluationError(f"unknown state {s!r} ({what}); states are {', '.join(states)}")
    return [states.index(s) for s in names]


def _scalar_or_list(vals):
    vals = [float(v) if np.isfinite(v) else None for v in vals]
    return vals[0] if len(vals) == 1 else vals


def _absent(states, edges, rates):
    """Edges whose rate is zero in every row (absent at these values)."""
    zero = (rates == 0).all(axis=0)
    return [_edge_name(states, edges[e]) for e in np.flatnonzero(zero)]


def _setup(model, values, source, groups):
    states = list(model.states)
    edges = [tuple(e) for e in model.info.edges]
    src = _indices(states, [source], "source")[0]
    idx_groups = [_indices(states, g, "target") for g in groups]
    rates = checked_rates(model.labels(values if values is not None else {}), edges, states)
    return states, edges, src, _disjoint(idx_groups), rates


def _trap_note(states, trapped):
    rows = [t for t in trapped if t]
    if not rows:
        return None
    names = sorted({states[s] for t in rows for s in t}, key=states.index)
    return names


def mean_first_passage(model, values=None, *, source: str, targets) -> dict:
    """Mean first-passage time from ``source`` to a set of target states.

    Parameters
    ----------
    model : CompiledModel
    values : dict or array, optional
        Symbol values (missing names take the model's values); several rows
        give several times.
    source : str
        Starting state.
    targets : str or sequence of str
        Target states (absorbing).

    Returns
    -------
    dict
        ``source``, ``targets``, ``mean_time`` (a float for one set of
        values, a list for several; None where the time is infinite),
        ``absent_edges`` (edges whose rate is zero at these values, e.g. a
        zero concentration: they are removed), ``units`` and ``note``. When
        the chain can reach states from which no target is reachable, the
        mean time is infinite (None) and ``trapped_in`` names those states.
        With several targets, ``absorption`` (target → probability of
        reaching it first; a float or a list per target) and ``never`` (the
        probability of reaching no target). Computed by the subtraction-free
        state reduction of :func:`passage_times`.
    """
    if isinstance(targets, str):
        targets = [targets]
    targets = list(targets)
    if not targets:
        raise EvaluationError("give at least one target state")
    states, edges, src, groups, rates = _setup(model, values, source, [[t] for t in targets])
    flat = [t for g in groups for t in g]
    times, _, trapped = _solve(len(states), edges, rates, src, [flat])
    out = {"source": source, "targets": targets, "mean_time": _scalar_or_list(times),
           "absent_edges": _absent(states, edges, rates),
           "units": "time unit of the rates",
           "note": "model predictions of the scheme, not measurements"}
    if len(targets) > 1:
        split = absorption_probabilities(model, values, source=source, targets=targets)
        out["absorption"] = split["absorption"]
        out["never"] = split["never"]
    trap = _trap_note(states, trapped)
    if trap:
        out["trapped_in"] = trap
        out["note"] += (f"; mean_time is null (infinite) where the chain can reach "
                        f"{', '.join(trap[:6])}{' ...' if len(trap) > 6 else ''}, "
                        f"from which no target is reachable")
    return out


def absorption_probabilities(model, values=None, *, source: str, targets=None) -> dict:
    """Splitting (absorption) probabilities from ``source``.

    Parameters
    ----------
    model : CompiledModel
    values : dict or array, optional
        Symbol values; several rows give lists.
    source : str
        Starting state.
    targets : sequence of str or of sequences of str, optional
        Target states or target sets (disjoint), absorbing. Default: the
        terminal components of the scheme at these values (states with no
        way out), each a set named by its states joined with "+".

    Returns
    -------
    dict
        ``source``, ``targets`` (the names used as keys), ``absorption``
        (target → probability of reaching it before the others; a float, or
        a list for several rows), ``never`` (probability of reaching no
        target: trapped where none is reachable), ``trapped_in`` (those
        states, when the chain can reach them), ``absent_edges``, ``units``
        and ``note``. Subtraction-free: small probabilities keep their
        relative accuracy.
    """
    states = list(model.states)
    if targets is None:
        edges = [tuple(e) for e in model.info.edges]
        rates = checked_rates(model.labels(values if values is not None else {}), edges, states)
        live = [e for e, ok in zip(edges, (rates > 0).all(axis=0)) if ok]
        comps = terminal_components(len(states), live)
        groups = [[states[s] for s in c] for c in comps]
    else:
        if isinstance(targets, str):
            targets = [targets]
        groups = [[g] if isinstance(g, str) else list(g) for g in targets]
    if not groups:
        raise EvaluationError("give at least one target state")
    keys = ["+".join(g) for g in groups]
    states, edges, src, idx_groups, rates = _setup(model, values, source, groups)
    _, probs, trapped = _solve(len(states), edges, rates, src, idx_groups)
    out = {"source": source, "targets": keys,
           "absorption": {k: _scalar_or_list(probs[:, g]) for g, k in enumerate(keys)},
           "never": _scalar_or_list(probs[:, -1]),
           "absent_edges": _absent(states, edges, rates),
           "units": "probabilities",
           "note": "model predictions of the scheme, not measurements"}
    trap = _trap_note(states, trapped)
    if trap:
        out["trapped_in"] = trap
    return out
