"""Fitting free parameters to measured steady-state observables.

Data: a table whose columns name symbols (inputs or parameters held fixed
per row), observables (measured values; a state name stands for its
probability) and optionally ``sigma_<observable>`` (standard deviations).
The free parameters — those with both a min and a max in the model, not
fixed by a column or by ``values`` — are fitted in log space,
u = ln θ ∈ [ln min, ln max], minimizing ½ Σ r² with residuals
r = (prediction − measurement)/σ (σ = 1 without sigma columns), by
scipy.optimize.least_squares (trust-region reflective; scipy is imported
here only).

Uncertainties are the usual asymptotic standard errors (e.g. Bates & Watts,
"Nonlinear Regression Analysis and Its Applications", Wiley 1988, §2.3):
cov(u) = s² (JᵀJ)⁻¹ with J the Jacobian of the residuals with respect to u
at the optimum (central differences) and s² = Σ r² / (m − p) the residual
variance (m residuals, p free parameters); σ(θ) = θ σ(u) by the delta
method. J is the compiled Jacobian (``jac``/``obs_jac``) when the model was
compiled with ``jacobian=True`` (also handed to the optimizer), else
central differences. Observables may be rates (weights that depend on the
parameters, e.g. an initial velocity k_cat·p(ES)); their gradients include
the weights' own derivatives. With sigma columns s² is the reduced chi-square, so the errors are
scaled by the observed scatter either way.

Fits explain themselves: the singular value decomposition of J names the
combinations of parameters the data cannot identify (directions in ln θ with
singular values below 1e-7 of the largest: "the data cannot identify
kon*koff; only koff/kon is identifiable"), strong correlations
(|r| > 0.9) and the degrees of freedom are reported, and profile-likelihood
intervals (Venzon & Moolgavkar 1988; Bates & Watts ch. 6) are computed for
the parameters asked for: each fixed on a grid, the others re-fitted, the
interval where Δ(Σ r²) ≤ χ²₁(0.95) s² (the re-fits use the compiled Jacobian
when the model has one).

Evaluation (:class:`_Problem`): the data rows are one C-contiguous float64
array built once; each residual or Jacobian evaluation writes θ = exp(u) into
its free columns and makes one checked public call of the model
(``observables``/``observable_jacobian``, or ``steady_state``/``jacobian`` for
state columns), then gathers the measured entries by precomputed flat
indices. Recent points are remembered, so the optimizer's start (already
evaluated by the time probe) and the reported optimum are not evaluated
twice. ``benches/bench_fit.py`` measures where a fit's time goes.
"""

from __future__ import annotations

import csv
import math
import os
import time
from pathlib import Path

import numpy as np

from .errors import EvaluationError
from .progress import progress

# A fit is refused up front when its estimated time exceeds this many seconds
# (override with the environment variable TREEFLUX_TIME_BUDGET or max_seconds=).
TIME_BUDGET_SECONDS = 3600.0

__all__ = ["fit", "read_table", "identifiability", "profile_interval", "combination_text"]

CORRELATION_SHOWN = 0.9     # |correlation| above which a pair of parameters is reported
NULL_TOLERANCE = 1e-7       # singular value / largest below which a direction is not identifiable
                            # (cond(J^T J) > 1e14: the covariance is not computed)
PROFILE_REFINE = 12         # bisection steps locating each end of a profile interval
POOR_TOLERANCE = 1e-3       # ... below which an identifiable direction is reported as poorly determined
MAX_EXPONENT = 6            # largest integer exponent used to name a combination
INTEGER_TOLERANCE = 2e-3    # how close to integers (after scaling) the exponents must be

UNCERTAINTY_METHOD = ("standard errors sqrt(diag((J^T J)^-1) * s^2): J = Jacobian of the residuals "
                      "with respect to ln(parameter) at the optimum, s^2 = sum(r^2)/(m - p) the "
                      "residual variance; converted to parameter units by the delta method "
                      "(theta * sigma_ln_theta)")


def read_table(path) -> dict:
    """Read a CSV file with a header row into name → float array.

    Empty cells become NaN (not measured); anything else that is not a
    number is refused with its row and column.
    """
    path = Path(path)
    try:
        # utf-8-sig: a byte-order mark (spreadsheets write one) is accepted and dropped
        with open(path, newline="", encoding="utf-8-sig") as fh:
            rows = list(csv.reader(fh))
    except OSError as exc:
        raise EvaluationError(f"cannot read {path}: {exc.strerror or exc}") from None
    except UnicodeDecodeError as exc:
        raise EvaluationError(f"{path}: not UTF-8 text (byte 0x{exc.object[exc.start]:02x} at offset "
                              f"{exc.start}); save the table as UTF-8 CSV") from None
    except csv.Error as exc:
        raise EvaluationError(f"{path}: not a readable CSV table ({exc})") from None
    rows = [r for r in rows if any(c.strip() for c in r)]
    if len(rows) < 2:
        raise EvaluationError(f"{path}: needs a header row and at least one data row")
    header = [h.strip() for h in rows[0]]
    if len(set(header)) != len(header) or any(not h for h in header):
        raise EvaluationError(f"{path}: header names must be non-empty and distinct")
    cols: dict = {h: [] for h in header}
    for k, row in enumerate(rows[1:], start=2):
        if len(row) != len(header):
            raise EvaluationError(f"{path}: line {k} has {len(row)} fields, the header has {len(header)}")
        for h, cell in zip(header, row):
            cell = cell.strip()
            try:
                cols[h].append(float(cell) if cell else math.nan)
            except ValueError:
                raise EvaluationError(f"{path}: line {k}, column {h!r}: {cell!r} is not a number") from None
    return {h: np.array(v) for h, v in cols.items()}


def _classify(model, table: dict, values: dict):
    symbols = tuple(model.symbols)
    obs_names = tuple(model.observable_names)
    states = tuple(model.states)
    fixed_cols, obs_cols, sig_cols = {}, {}, {}
    lengths = {len(np.atleast_1d(v)) for v in table.values()}
    if len(lengths) != 1:
        raise EvaluationError("data columns must all have the same length")
    for name, col in table.items():
        col = np.asarray(col, dtype=float)
        if name in symbols:
            if name in values:
                raise EvaluationError(f"symbol {name!r} is both a data column and fixed by a value")
            fixed_cols[name] = col
        elif name in obs_names or name in states:
            obs_cols[name] = col
        elif name.startswith("sigma_") and (name[6:] in obs_names or name[6:] in states):
            sig_cols[name[6:]] = col
        else:
            raise EvaluationError(f"data column {name!r} is neither a symbol, an observable, a state "
                                  f"nor sigma_<observable>; observables: {', '.join(obs_names) or '(none)'}")
    if not obs_cols:
        raise EvaluationError(f"the data have no observable column; observables: "
                              f"{', '.join(obs_names) or '(none)'}; states: {', '.join(states)}")
    for o in sig_cols:
        if o not in obs_cols:
            raise EvaluationError(f"column sigma_{o} has no matching column {o!r}")
    return fixed_cols, obs_cols, sig_cols


def _time_budget(max_seconds) -> float:
    if max_seconds is not None:
        return float(max_seconds)
    text = os.environ.get("TREEFLUX_TIME_BUDGET", "")
    try:
        value = float(text) if text else TIME_BUDGET_SECONDS
    except ValueError:
        raise EvaluationError(f"TREEFLUX_TIME_BUDGET={text!r} is not a number of seconds") from None
    return value if value > 0 else TIME_BUDGET_SECONDS


def _refuse_time(starts: int, per_start: float, budget: float, how: str) -> None:
    total = starts * per_start
    if total > budget:
        raise EvaluationError(f"{starts:,} starts would take about {total:,.0f} s ({how}), more than the "
                              f"time budget of {budget:,.0f} s; use fewer starts or raise "
                              f"TREEFLUX_TIME_BUDGET")


# Below this many rows a fit asks for one thread and so skips the per-call
# thread rule (runtime.kernel.Kernel.threads_for): the kernel is a small part
# of a small fit's evaluation (LLVM, 2,000 rows: 50 us of 150 us per call).
ONE_THREAD_ROWS = 4096
MEMORY = 8                  # evaluation points a fit remembers (r and J at each)


class _Problem:
    """The residuals r(u) = (prediction − measurement)/σ of a fit and their
    Jacobian ∂r/∂u, u = ln θ of the free parameters.

    Every evaluation goes through the model's checked public calls
    (``observables``, ``steady_state``, ``observable_jacobian``, ``jacobian``:
    input validation, the steady-state guard, the recompute of untrusted rows)
    on one C-contiguous float64 array of the data rows, built once; only its
    free columns are overwritten with θ = exp(u). The measured entries are
    picked out by precomputed (row, column) indices, so an evaluation costs one
    model call plus a few array operations. The last ``MEMORY`` points are
    remembered, and the best optimum is held (:meth:`keep`): the optimizer
    starts where the time probe evaluated, and the report needs r and J at an
    optimum the optimizer has already evaluated.
    """

    def __init__(self, model, X, free_idx, cols, Y, S):
        self.model = model
        self.X = np.array(X, dtype=np.float64, order="C")      # owned: written in place
        self.free = np.asarray(free_idx, dtype=np.intp)
        self.Y, self.S = Y, S
        self.threads = 1 if self.X.shape[0] < ONE_THREAD_ROWS else None
        # residual j is column k of row rows[j] of the observables (is_obs) or of p;
        # per part: its positions among the residuals, the flat positions of its
        # entries in O (or P) and of their free-parameter derivatives in the Jacobian
        is_obs = np.concatenate([np.full(int(mask.sum()), o, dtype=bool) for o, _, mask in cols])
        rows = np.concatenate([np.flatnonzero(mask) for _, _, mask in cols])
        ks = np.concatenate([np.full(int(mask.sum()), k, dtype=np.intp) for _, k, mask in cols])
        n_sym = self.X.shape[1]
        self.parts = []
        for here, width in ((is_obs, len(model.observable_names)), (~is_obs, len(model.states))):
            at = np.flatnonzero(here)
            entry = rows[at] * width + ks[at]
            self.parts.append((at if at.size < len(Y) else None, entry,
                               entry[:, None] * n_sym + self.free[None, :]) if at.size else None)
        self._P = np.empty((self.X.shape[0], len(model.states))) if self.parts[1] else None
        self._memory: dict = {}
        self._kept: dict = {}          # the best optimum so far, never pushed out

    def _slot(self, u) -> list:
        """[r, J] remembered at u (None where not yet evaluated)."""
        key = np.asarray(u, dtype=np.float64).tobytes()
        slot = self._kept.get(key) or self._memory.get(key)
        if slot is None:
            while len(self._memory) >= MEMORY:
                self._memory.pop(next(iter(self._memory)))
            slot = self._memory[key] = [None, None]
        return slot

    def keep(self, u) -> None:
        """Hold on to the point u (the best optimum so far) for the report."""
        key = np.asarray(u, dtype=np.float64).tobytes()
        self._kept = {key: self._slot(u)}

    def _set(self, u) -> None:
        self.X[:, self.free] = np.exp(u)

    def residuals(self, u) -> np.ndarray:
        slot = self._slot(u)
        if slot[0] is None:
            self._set(u)
            m, X, (obs, states) = self.model, self.X, self.parts
            if states:
                P = m.steady_state(X, out=self._P, threads=self.threads)
                O = m.observables_from(X, P) if obs else None
            else:
                P, O = None, m.observables(X, threads=self.threads)
            pred = self._gather(((obs, O, 1), (states, P, 1)))
            pred -= self.Y
            pred /= self.S
            slot[0] = pred
        return slot[0].copy()

    def jacobian(self, u) -> np.ndarray:
        """∂r/∂ln θ of the free parameters from the compiled Jacobians."""
        slot = self._slot(u)
        if slot[1] is None:
            self._set(u)
            m, X, (obs, states) = self.model, self.X, self.parts
            Jo = m.observable_jacobian(X, threads=self.threads) if obs else None
            Jp = m.jacobian(X, threads=self.threads) if states else None
            D = self._gather(((obs, Jo, 2), (states, Jp, 2)))
            if not m.info.log_jacobian:
                D *= np.exp(u)                  # ∂/∂ln θ = θ ∂/∂θ (θ = exp(u) on every row)
            D /= self.S[:, None]
            slot[1] = D
        return slot[1].copy()

    def _gather(self, sources) -> np.ndarray:
        """The measured entries (which=1) or their free-parameter derivatives
        (which=2) from each part's array, in residual order."""
        out = None
        for part, A, which in sources:
            if part is None:
                continue
            at, picked = part[0], np.take(A, part[which])
            if at is None:
                return picked                     # one part holds every residual
            if out is None:
                out = np.empty((len(self.Y),) + picked.shape[1:])
            out[at] = picked
        return out


def fit(model, data, *, values=None, starts: int = 1, seed: int = 0,
        max_evaluations: int = 2000, max_seconds: float | None = None,
        profile=None) -> dict:
    """Least-squares fit of the bounded parameters to measured observables.

    Parameters
    ----------
    model : CompiledModel
    data : dict or path
        Name → column (equal lengths), or a CSV file read by :func:`read_table`.
    values : dict, optional
        Symbols held fixed for every row (name → number).
    starts : int
        Number of starting points: the model's values (clipped into the
        bounds; the log-midpoint of the bounds without one), then
        log-uniform random draws (seeded). The best optimum is kept.
    seed : int
        Seed for the extra starting points.
    max_evaluations : int
        Cap on residual evaluations per start.
    max_seconds : float, optional
        Time budget (default ``TREEFLUX_TIME_BUDGET`` or 3600 s). Refused up
        front when ``starts`` × a lower bound of one start's cost exceeds it
        (one residual evaluation is timed; a start costs at least p + 1 of
        them), and again after the first start from its measured time.
    profile : list or comma-separated str, optional
        Fitted parameters to give profile-likelihood intervals
        (:func:`profile_interval`).

    Returns
    -------
    dict
        ``parameters`` (best fit, free parameters), ``uncertainties``
        (standard errors in parameter units; None when not determined),
        ``log_uncertainties`` (standard errors of ln θ), ``uncertainty_method``,
        ``cost`` (½ Σ r²), ``residual_variance`` (s²), ``n_residuals``,
        ``n_free``, ``fixed``, ``at_bounds``, ``success``, ``message``,
        ``evaluations``, ``weighted``, ``note``; ``degrees_of_freedom``
        (m − p); ``correlations`` (pairs with |r| > 0.9 from the covariance of
        ln θ: ``a``, ``b``, ``r``; None when the covariance is undetermined);
        ``identifiability`` (see :func:`identifiability`: ``message``,
        ``unidentifiable`` and ``identifiable`` combinations, relative
        ``singular_values``); with ``profile``, ``profiles`` (name →
        interval, see :func:`profile_interval`).
    """
    try:
        from scipy.optimize import least_squares
    except ImportError:
        raise EvaluationError("fitting needs scipy, which is not installed") from None
    values = dict(values or {})
    if not isinstance(data, dict):
        data = read_table(data)
    fixed_cols, obs_cols, sig_cols = _classify(model, data, values)
    m_rows = len(next(iter(data.values())))
    free = [p for p in model.info.parameters
            if p not in values and p not in fixed_cols
            and None not in model.info.bounds.get(p, (None, None))
            and model.info.bounds[p][0] < model.info.bounds[p][1]]
    if not free:
        raise EvaluationError("no free parameters: give parameters both min and max in the model "
                              "(and do not fix them with a value or a data column)")
    for p in free:
        if not model.info.bounds[p][0] > 0:
            raise EvaluationError(f"parameter {p!r}: fitting in log space needs min > 0")
    # rows: fixed columns, values, defaults; free columns filled per evaluation
    placeholders = {p: math.sqrt(model.info.bounds[p][0] * model.info.bounds[p][1]) for p in free}
    for name, col in fixed_cols.items():
        if not np.all(np.isfinite(col)):
            raise EvaluationError(f"data column {name!r} has an empty or non-finite cell")
    X = model.as_array({**values, **placeholders, **fixed_cols})
    X = np.ascontiguousarray(np.broadcast_to(X, (m_rows, X.shape[1])))
    free_idx = [model.symbols.index(p) for p in free]
    # measured values, flattened over (column, row); a column is an
    # observable (weights may be rate expressions) or a state's probability
    cols, Y, S = [], [], []
    obs_names = tuple(model.observable_names)
    for o, col in obs_cols.items():
        sig = sig_cols.get(o, np.ones(m_rows))
        mask = np.isfinite(col)
        bad = mask & ~(np.isfinite(sig) & (sig > 0))
        if bad.any():
            raise EvaluationError(f"column sigma_{o}: row {int(np.flatnonzero(bad)[0]) + 1} "
                                  f"needs a positive standard deviation")
        cols.append((o in obs_names, obs_names.index(o) if o in obs_names else model.states.index(o), mask))
        Y.append(col[mask])
        S.append(sig[mask])
    Y, S = np.concatenate(Y), np.concatenate(S)
    m_res, p = len(Y), len(free)
    if m_res == 0:
        raise EvaluationError(f"the data have no measured values: every cell of "
                              f"{', '.join(repr(o) for o in obs_cols)} is empty")
    analytic = _has_jacobian(model, cols)
    problem = _Problem(model, X, free_idx, cols, Y, S)
    residuals, jacobian = problem.residuals, problem.jacobian

    lo = np.log([model.info.bounds[q][0] for q in free])
    hi = np.log([model.info.bounds[q][1] for q in free])
    profile = _profile_names(profile, free)
    inner = 1e-9 * (hi - lo)
    u0 = []
    for q, a, b in zip(free, lo, hi):
        v = model.info.defaults.get(q)
        u0.append(math.log(v) if v is not None else 0.5 * (a + b))
    try:
        starts = int(starts)
    except (TypeError, ValueError):
        raise EvaluationError(f"starts must be a positive integer, got {starts!r}") from None
    if starts < 1:
        raise EvaluationError(f"starts must be a positive integer, got {starts}")
    budget = _time_budget(max_seconds)
    t0 = time.perf_counter()
    residuals(np.clip(np.array(u0), lo + inner, hi - inner))
    t_eval = time.perf_counter() - t0
    _refuse_time(starts, (p + 1) * t_eval, budget, f"at least {p + 1} residual evaluations per start")
    if profile:
        # each profile: two ends, each at least one grid point and PROFILE_REFINE bisection
        # steps, each a re-fit costing at least p residual evaluations
        least = 2 * (1 + PROFILE_REFINE) * p
        _refuse_time(len(profile), least * t_eval, budget,
                     f"profiles: at least {least} residual evaluations per profiled parameter")
    rng = np.random.default_rng(seed)
    best = None
    with progress("fitting", total=starts, unit="start") as bar:
        for k in range(starts):
            start = np.array(u0) if k == 0 else lo + rng.random(p) * (hi - lo)
            start = np.clip(start, lo + inner, hi - inner)
            t0 = time.perf_counter()
            res = least_squares(residuals, start, jac=jacobian if analytic else "2-point",
                                bounds=(lo, hi), method="trf", x_scale=1.0,
                                max_nfev=max_evaluations, xtol=1e-12, ftol=1e-12, gtol=1e-12)
            if k == 0 and starts > 1:
                _refuse_time(starts, time.perf_counter() - t0, budget, "the first start's time")
            if best is None or res.cost < best.cost:
                best = res
                problem.keep(res.x)
            bar.update(1)
    u = best.x
    r = residuals(u)
    J = jacobian(u) if analytic else _central_jacobian(residuals, u)
    dof = m_res - p
    result = {
        "parameters": dict(zip(free, np.exp(u).tolist())),
        "cost": 0.5 * float(r @ r),
        "n_residuals": m_res,
        "n_free": p,
        "degrees_of_freedom": dof,
        "fixed": {k: float(v) for k, v in zip(model.symbols, X[0])
                  if k not in free and k not in fixed_cols},
        "at_bounds": [q for q, x, a, b in zip(free, u, lo, hi) if x - a < 1e-6 or b - x < 1e-6],
        "success": bool(best.success),
        "message": str(best.message),
        "evaluations": int(best.nfev),
        "weighted": bool(sig_cols),
        "jacobian": "compiled" if analytic else "central differences",
        "uncertainty_method": UNCERTAINTY_METHOD,
        "note": "best-fit parameters of the model; uncertainties are asymptotic (linearized) estimates",
        "correlations": None,
    }
    s2 = float(r @ r) / dof if dof > 0 else None
    result["residual_variance"] = s2
    result["identifiability"] = identifiability(J, free, u, s2)
    if dof <= 0:
        result["uncertainties"] = {q: None for q in free}
        result["log_uncertainties"] = {q: None for q in free}
        result["note"] += f"; {m_res} residuals for {p} parameters leave no degrees of freedom for uncertainties"
    else:
        _wald(result, J, u, s2, free)
    if profile:
        scale = s2 if s2 is not None else (1.0 if sig_cols else None)
        result["profiles"] = {}
        with progress("profiling", total=len(profile), unit="parameter") as bar:
            for q in profile:
                result["profiles"][q] = profile_interval(residuals, u, lo, hi, free.index(q), scale,
                                                         result["log_uncertainties"][q], free,
                                                         jacobian=jacobian if analytic else None)
                bar.update(1)
    return result


def _profile_names(profile, free) -> list:
    """The parameters to profile: a list or a comma-separated string of free parameters."""
    if not profile:
        return []
    names = [t.strip() for t in profile.split(",")] if isinstance(profile, str) else list(profile)
    names = [t for t in names if t]
    for q in names:
        if q not in free:
            raise EvaluationError(f"cannot profile {q!r}: it is not a fitted parameter; "
                                  f"fitted: {', '.join(free)}")
    return list(dict.fromkeys(names))


def _wald(result, J, u, s2, free) -> None:
    """Asymptotic standard errors and strong correlations (|r| > CORRELATION_SHOWN);
    undetermined when J has a null direction (see :func:`identifiability`)."""
    s, Vt, small = _spectrum(J, len(free))
    if small.any():
        result["uncertainties"] = {q: None for q in free}
        result["log_uncertainties"] = {q: None for q in free}
        result["note"] += "; J^T J is singular: the parameters are not all identifiable from these data"
        return
    cov = (Vt.T / s ** 2) @ Vt * s2            # s² (J^T J)^-1 from the SVD of J
    su = np.sqrt(np.maximum(np.diag(cov), 0.0))
    result["log_uncertainties"] = dict(zip(free, su.tolist()))
    result["uncertainties"] = dict(zip(free, (np.exp(u) * su).tolist()))
    result["covariance_log"] = cov.tolist()
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = cov / np.outer(su, su)
    result["correlations"] = [
        {"a": free[i], "b": free[j], "r": float(corr[i, j])}
        for i in range(len(free)) for j in range(i + 1, len(free))
        if np.isfinite(corr[i, j]) and abs(corr[i, j]) > CORRELATION_SHOWN]


# ------------------------------------------------------------------ identifiability

def _rref(A: np.ndarray, tol: float = 1e-8) -> np.ndarray:
    """Reduced row echelon form of a full-row-rank matrix (partial pivoting)."""
    A = np.array(A, dtype=float)
    rows, cols = A.shape
    r = 0
    for c in range(cols):
        if r == rows:
            break
        k = r + int(np.argmax(np.abs(A[r:, c])))
        if abs(A[k, c]) < tol:
            continue
        A[[r, k]] = A[[k, r]]
        A[r] /= A[r, c]
        for i in range(rows):
            if i != r:
                A[i] -= A[i, c] * A[r]
        r += 1
    A[np.abs(A) < tol] = 0.0
    return A[:r]


def _exponents(vec: np.ndarray):
    """Small integer exponents proportional to ``vec`` (|e| ≤ MAX_EXPONENT), or None."""
    vec = np.asarray(vec, dtype=float)
    big = np.max(np.abs(vec))
    if big == 0:
        return None
    v = vec / big
    for q in range(1, MAX_EXPONENT + 1):
        w = v * q
        e = np.round(w)
        if np.max(np.abs(w - e)) <= INTEGER_TOLERANCE and np.any(e != 0):
            return e.astype(int)
    return None


def _oriented(vec: np.ndarray) -> np.ndarray:
    """Sign convention: more positive than negative entries; on a tie, the last nonzero positive
    (so the combination of (kon, koff) reads koff/kon)."""
    pos, neg = int(np.sum(vec > 0)), int(np.sum(vec < 0))
    last = vec[np.flatnonzero(vec)[-1]] if np.any(vec) else 1.0
    return -vec if neg > pos or (neg == pos and last < 0) else vec


def combination_text(exponents, names) -> str:
    """``{'koff': 1, 'kon': -1}`` → ``koff/kon``; ``k1^2*k3/k2``."""
    def part(items):
        return "*".join(n if e == 1 else f"{n}^{e:g}" for n, e in items)
    up = [(n, e) for n, e in zip(names, exponents) if e > 0]
    down = [(n, -e) for n, e in zip(names, exponents) if e < 0]
    if not up:
        return "1/" + (part(down) if len(down) == 1 else f"({part(down)})")
    if not down:
        return part(up)
    return part(up) + "/" + (part(down) if len(down) == 1 else f"({part(down)})")


def _describe(vec: np.ndarray, names) -> dict:
    e = _exponents(vec)
    if e is not None:
        e = _oriented(e)
        return {"expression": combination_text(e, names),
                "exponents": {n: int(k) for n, k in zip(names, e) if k != 0}}
    v = _oriented(vec / np.max(np.abs(vec)))
    return {"expression": None,
            "exponents": {n: round(float(k), 4) for n, k in zip(names, v) if abs(k) > 1e-12}}


def _spectrum(J: np.ndarray, p: int, tolerance: float = NULL_TOLERANCE):
    """Singular values of J (p of them, zeros added when m < p), the right singular
    vectors as rows, and which singular values count as zero (≤ tolerance · largest)."""
    s_full = np.zeros(p)
    # only V is needed: U in full would be m × m (32 MB for 2,000 residuals); all
    # p rows of V^T come back in the thin form whenever m ≥ p
    _, s, Vt = np.linalg.svd(J, full_matrices=J.shape[0] < p)
    s_full[:len(s)] = s
    smax = float(s_full.max()) if p else 0.0
    small = s_full <= tolerance * smax if smax > 0 else np.ones(p, dtype=bool)
    return s_full, Vt, small


def identifiability(J: np.ndarray, names, u=None, s2=None, *, tolerance: float = NULL_TOLERANCE) -> dict:
    """Which combinations of ln-parameters the residuals determine, from the SVD of J.

    J = U diag(s) Vᵀ (m residuals × p parameters, derivatives in ln θ). A right
    singular vector whose singular value is below ``tolerance`` · s_max is a
    direction in ln θ along which the residuals do not change (to first order):
    the data cannot identify the combination ∏ θ_k^{v_k}. The orthogonal
    complement (the row space of J) holds the identifiable combinations; both
    are reported in reduced row echelon form, as products and ratios of
    parameters with small integer exponents where the direction is close to
    one (else as the exponent vector). Identifiable directions with singular
    values below POOR_TOLERANCE · s_max are listed as ``poorly_identified``.
    With ``u`` and ``s2``, each identifiable combination also gets its value
    and the standard error of its ln, s·√(cᵀ(JᵀJ)⁺c).
    """
    names = list(names)
    p = len(names)
    s_full, Vt, small = _spectrum(J, p, tolerance)
    smax = float(s_full.max()) if p else 0.0
    weak = ~small & (s_full < POOR_TOLERANCE * smax)
    null = _rref(Vt[small]) if small.any() else np.zeros((0, p))
    rowspace = _rref(Vt[~small]) if (~small).any() else np.zeros((0, p))
    out = {
        "singular_values": (s_full / smax).tolist() if smax > 0 else s_full.tolist(),
        "tolerance": tolerance,
        "unidentifiable": [_describe(v, names) for v in null],
        "identifiable": [_describe(v, names) for v in rowspace],
        "poorly_identified": [_describe(v, names) for v in _rref(Vt[weak])] if weak.any() else [],
        "individually_identifiable": [n for k, n in enumerate(names)
                                      if not small.any() or np.max(np.abs(Vt[small][:, k])) < 1e-6],
    }
    if u is not None and s2 is not None and (~small).any():
        V = Vt[~small].T
        pinv = V @ np.diag(1.0 / s_full[~small] ** 2) @ V.T
        for item in out["identifiable"]:
            c = np.array([item["exponents"].get(n, 0.0) for n in names])
            item["value"] = float(np.exp(c @ u))
            item["log_uncertainty"] = float(math.sqrt(max(s2 * c @ pinv @ c, 0.0)))
    out["message"] = _identifiability_message(out, p)
    return out


def _identifiability_message(info: dict, p: int) -> str:
    def show(item):
        if item["expression"] is not None:
            return item["expression"]
        return "the direction (" + ", ".join(f"{k}: {v:g}" for k, v in item["exponents"].items()) + ") in ln"
    bad, good, weak = info["unidentifiable"], info["identifiable"], info["poorly_identified"]
    poor = ("; poorly determined (singular value below "
            f"{POOR_TOLERANCE:g} of the largest): " + ", ".join(show(w) for w in weak)) if weak else ""
    if not bad:
        return ("the parameter is" if p == 1 else f"all {p} parameters are") + \
            " locally identifiable from these data" + poor
    text = "the data cannot identify " + ", ".join(show(b) for b in bad)
    if not good:
        return text + "; no combination of the parameters is identifiable"
    if len(good) == 1:
        return text + f"; only {show(good[0])} is identifiable" + poor
    return text + "; identifiable: " + ", ".join(show(g) for g in good) + poor


# ------------------------------------------------------------------ profile likelihood

def profile_interval(residuals, u_hat, lo, hi, k: int, scale, log_sigma, names, *,
                     level: float = 0.95, max_steps: int = 40, refine: int | None = None,
                     jacobian=None) -> dict:
    """Profile-likelihood interval of parameter ``k``.

    ln θ_k is fixed on a grid walking out from the optimum in both directions
    (steps growing by 1.5×, starting from half the standard error of ln θ_k, or
    0.25 without one); at each point the other parameters are re-fitted. The
    interval is where Δcost ≤ ½ χ²₁(level) · scale (scale: the residual
    variance s², as for the standard errors — so on a linear problem the
    interval equals the Wald interval θ̂·exp(±z σ_ln)); each end is refined by
    bisection. An end is open when Δcost stays below the threshold up to the
    parameter's bound. ``jacobian`` (∂r/∂u at a full u, e.g. from the compiled
    Jacobian) is handed to the re-fits; without it they use forward differences.
    """
    from scipy.optimize import least_squares
    from scipy.special import ndtri
    refine = PROFILE_REFINE if refine is None else refine
    name = names[k]
    if scale is None:
        return {"parameter": name, "lower": None, "upper": None, "lower_open": None, "upper_open": None,
                "note": "no degrees of freedom to scale the threshold (and no sigma columns)"}
    # χ²₁ is the square of a standard normal: its level quantile is z² with z the
    # (1 + level)/2 normal quantile (common practice; spares importing scipy.stats)
    z = float(ndtri(0.5 + level / 2))
    threshold = 0.5 * z * z * scale
    others = [j for j in range(len(u_hat)) if j != k]
    r0 = residuals(u_hat)
    cost0 = 0.5 * float(r0 @ r0)
    points = []

    def at(t, start):
        full = np.array(u_hat, dtype=float)
        full[k] = t
        if others:
            lo_o, hi_o = lo[others], hi[others]
            x0 = np.clip(start, lo_o + 1e-9 * (hi_o - lo_o), hi_o - 1e-9 * (hi_o - lo_o))

            def sub(v):
                full[others] = v
                return residuals(full)

            def sub_jacobian(v):
                full[others] = v
                return jacobian(full)[:, others]
            res = least_squares(sub, x0, jac=sub_jacobian if jacobian is not None else "2-point",
                                bounds=(lo_o, hi_o), method="trf", xtol=1e-12,
                                ftol=1e-12, gtol=1e-12, max_nfev=500)
            full[others] = res.x
        rr = residuals(full)
        d = 0.5 * float(rr @ rr) - cost0
        points.append((float(math.exp(t)), d))
        return d, full[others].copy()

    step0 = 0.25 if log_sigma is None or not np.isfinite(log_sigma) or log_sigma <= 0 \
        else float(np.clip(0.5 * log_sigma, 1e-4, 1.0))
    ends, notes, better = {}, {}, 0.0
    for side, sign, bound in (("lower", -1.0, lo[k]), ("upper", 1.0, hi[k])):
        t_in, start_in, step = u_hat[k], u_hat[others], step0
        end = None
        for _ in range(max_steps):
            t = t_in + sign * step
            last = sign * (t - bound) >= 0
            if last:
                t = bound
            d, start = at(t, start_in)
            better = min(better, d)
            if d > threshold:
                t_out = t
                for _ in range(refine):
                    mid = 0.5 * (t_in + t_out)
                    dm, sm = at(mid, start_in)
                    if dm > threshold:
                        t_out = mid
                    else:
                        t_in, start_in = mid, sm
                end = math.exp(0.5 * (t_in + t_out))
                break
            t_in, start_in = t, start
            if last:
                notes[side] = (f"open: Δcost stays ≤ {threshold:.3g} out to the parameter's "
                               f"{'min' if sign < 0 else 'max'} {math.exp(bound):.6g}")
                break
            step *= 1.5
        else:
            notes[side] = f"open: Δcost stays ≤ {threshold:.3g} over the {max_steps} grid steps taken"
        ends[side] = end
    wald = None
    if log_sigma is not None and np.isfinite(log_sigma):
        wald = [math.exp(u_hat[k] - z * log_sigma), math.exp(u_hat[k] + z * log_sigma)]
    out = {"parameter": name, "best": math.exp(u_hat[k]), "level": level,
           "threshold_delta_cost": threshold,
           "lower": ends["lower"], "upper": ends["upper"],
           "lower_open": ends["lower"] is None, "upper_open": ends["upper"] is None,
           "notes": notes, "wald_interval": wald,
           "points": sorted(points)}
    if better < -1e-9 * max(1.0, cost0):
        out["warning"] = (f"profiling found a better fit (cost lower by {-better:.3g}): the reported optimum "
                          "is not the global one; refit with more --starts")
    return out


def _has_jacobian(model, cols) -> bool:
    """Whether the model was compiled with the Jacobians these columns need
    (``jac`` for state columns, ``obs_jac`` for observables)."""
    groups = model.info.groups
    return all(("obs_jac" if is_obs else "jac") in groups for is_obs, _, _ in cols)


def _central_jacobian(fun, u, step: float = 1e-6) -> np.ndarray:
    cols = []
    for k in range(len(u)):
        e = np.zeros_like(u)
        e[k] = step
        cols.append((fun(u + e) - fun(u - e)) / (2 * step))
    return np.stack(cols, axis=1)
