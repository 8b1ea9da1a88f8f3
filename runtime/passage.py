"""Mean first-passage times by subtraction-free state reduction.

The mean time τ_i to reach a target set T from state i solves
Σ_j ℓ(i→j)(τ_j − τ_i) = −1 for i ∉ T, τ_i = 0 on T: a linear system on the
Laplacian with T absorbing (equivalently, by the matrix-forest theorem, a
ratio of forest sums [2]_). Solving it by Gaussian elimination subtracts;
eliminating states one at a time the way Grassmann, Taksar and Heyman [1]_
compute steady states does not.

Each remaining state i carries out-rates r(i→j) (j ≠ i), their sum
R_i = Σ_j r(i→j), and a time weight T_i, with τ-contribution per visit
T_i / R_i (initially r = ℓ, T_i = 1). Removing a state k (neither the
source nor a target) censors the chain on the others:

    r(i→j) += r(i→k) r(k→j) / R_k      (j ≠ i; returns i→k→i are dropped)
    T_i    += r(i→k) T_k / R_k
    R_i     = Σ_j r(i→j)               (a sum of positive terms)

because the excursion through k costs T_k/R_k per visit to k and the
dropped self-loops only lengthen the current sojourn (the geometric number
of returns cancels against the smaller exit rate). When only the source s
and the targets remain, τ_s = T_s / Σ_{t ∈ T} r(s→t). Every operation adds,
multiplies or divides positive numbers, so the result keeps a small
entrywise relative error however the rates are spread (O'Cinneide [3]_
for the same argument on steady states).

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

__all__ = ["mean_first_passage", "passage_times"]


def _reach(n, succ, start, blocked):
    seen = {start}
    queue = deque([start])
    while queue:
        a = queue.popleft()
        if a in blocked:
            continue
        for b in succ[a]:
            if b not in seen:
                seen.add(b)
                queue.append(b)
    return seen


def passage_times(n: int, edges, rates: np.ndarray, *, source: int, targets) -> np.ndarray:
    """Mean first-passage times from ``source`` to the set ``targets``.

    Parameters
    ----------
    n : int
        Number of states.
    edges : sequence of (i, j)
        Edge list, in the column order of ``rates``.
    rates : (N, m) or (m,) array
        Positive edge rates, one row per parameter set.
    source : int
    targets : iterable of int

    Returns
    -------
    (N,) array
        Mean times; ``inf`` where the chain can stay away from the targets
        forever, 0 when the source is a target.
    """
    rates = np.atleast_2d(np.asarray(rates, dtype=np.float64))
    edges = [tuple(e) for e in edges]
    N = rates.shape[0]
    if rates.shape[1] != len(edges):
        raise EvaluationError(f"expected {len(edges)} rates per row, got {rates.shape[1]}")
    if not np.all(np.isfinite(rates)) or np.any(rates <= 0):
        raise EvaluationError("edge rates must be positive and finite")
    targets = set(int(t) for t in targets)
    if source in targets:
        return np.zeros(N)
    succ = [set() for _ in range(n)]
    pred = [set() for _ in range(n)]
    for i, j in edges:
        succ[i].add(j)
        pred[j].add(i)
    # states the chain can visit before absorption, and those that can reach T
    visit = _reach(n, succ, source, targets) - targets
    can = set()
    for t in targets:
        can |= _reach(n, pred, t, set())
    if not visit <= can:
        return np.full(N, np.inf)
    keep = sorted(visit)                      # transient states, source included
    tgt = sorted(t for t in targets if any(t in succ[i] for i in keep))
    order = keep + tgt
    pos = {s: k for k, s in enumerate(order)}
    m, nk = len(order), len(keep)
    r = np.zeros((N, nk, m))
    for col, (i, j) in enumerate(edges):
        if i in pos and j in pos and pos[i] < nk:
            r[:, pos[i], pos[j]] += rates[:, col]
    T = np.ones((N, nk))
    alive = np.ones(m, dtype=bool)
    s = pos[source]
    # eliminate the transient states other than the source, fewest links first
    todo = [k for k in range(nk) if k != s]
    while todo:
        links = [(int(np.count_nonzero(r[0, :, k][alive[:nk]])) * int(np.count_nonzero(r[0, k, alive])), k)
                 for k in todo]
        _, k = min(links)
        todo.remove(k)
        alive[k] = False
        R_k = r[:, k, :].sum(axis=1)           # k's row holds no self-loop
        into = r[:, :, k].copy()               # r(i→k), i transient
        into[:, k] = 0.0
        scale = into / R_k[:, None]            # r(i→k)/R_k
        r += scale[:, :, None] * r[:, k, None, :]
        T += scale * T[:, k, None]
        r[:, :, k] = 0.0
        r[:, k, :] = 0.0
        T[:, k] = 0.0
        idx = np.arange(nk)
        r[:, idx, idx] = 0.0                   # drop the i→k→i returns
    exit_rate = r[:, s, nk:].sum(axis=1)
    return T[:, s] / exit_rate


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
        values, a list for several; None where the time is infinite, with a
        ``note``), ``units`` and ``note``. Computed by the subtraction-free
        state reduction of :func:`passage_times`.
    """
    states = list(model.states)
    if isinstance(targets, str):
        targets = [targets]
    targets = list(targets)
    if not targets:
        raise EvaluationError("give at least one target state")
    for s in [source] + targets:
        if s not in states:
            raise EvaluationError(f"unknown state {s!r}; states are {', '.join(states)}")
    rates = model.labels(values if values is not None else {})
    times = passage_times(len(states), model.info.edges, rates, source=states.index(source),
                          targets=[states.index(t) for t in targets])
    vals = [float(t) if np.isfinite(t) else None for t in times]
    out = {"source": source, "targets": targets,
           "mean_time": vals[0] if len(vals) == 1 else vals,
           "units": "time unit of the rates",
           "note": "model predictions of the scheme, not measurements"}
    if any(v is None for v in vals):
        out["note"] += ("; mean_time is null (infinite) where the chain can reach a state "
                        "from which no target is reachable")
    return out
