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
method. With sigma columns s² is the reduced chi-square, so the errors are
scaled by the observed scatter either way.
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

__all__ = ["fit", "read_table"]

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


def fit(model, data, *, values=None, starts: int = 1, seed: int = 0,
        max_evaluations: int = 2000, max_seconds: float | None = None) -> dict:
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

    Returns
    -------
    dict
        ``parameters`` (best fit, free parameters), ``uncertainties``
        (standard errors in parameter units; None when not determined),
        ``log_uncertainties`` (standard errors of ln θ), ``uncertainty_method``,
        ``cost`` (½ Σ r²), ``residual_variance`` (s²), ``n_residuals``,
        ``n_free``, ``fixed``, ``at_bounds``, ``success``, ``message``,
        ``evaluations``, ``weighted``, ``note``.
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
    # measured values and weights, flattened over (observable, row)
    W, Y, S, names = [], [], [], []
    obs_names = tuple(model.observable_names)
    for o, col in obs_cols.items():
        if o in obs_names:
            w = model.observable_weights[:, obs_names.index(o)]
        else:
            w = np.zeros(len(model.states))
            w[model.states.index(o)] = 1.0
        sig = sig_cols.get(o, np.ones(m_rows))
        mask = np.isfinite(col)
        bad = mask & ~(np.isfinite(sig) & (sig > 0))
        if bad.any():
            raise EvaluationError(f"column sigma_{o}: row {int(np.flatnonzero(bad)[0]) + 1} "
                                  f"needs a positive standard deviation")
        W.append((w, mask))
        Y.append(col[mask])
        S.append(sig[mask])
        names.append(o)
    Y, S = np.concatenate(Y), np.concatenate(S)
    m_res, p = len(Y), len(free)

    def residuals(u):
        Xu = X.copy()
        Xu[:, free_idx] = np.exp(u)
        P = model.steady_state(Xu)
        pred = np.concatenate([(P @ w)[mask] for w, mask in W])
        return (pred - Y) / S

    lo = np.log([model.info.bounds[q][0] for q in free])
    hi = np.log([model.info.bounds[q][1] for q in free])
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
    _refuse_time(starts, (p + 1) * (time.perf_counter() - t0), budget,
                 f"at least {p + 1} residual evaluations per start")
    rng = np.random.default_rng(seed)
    best = None
    with progress("fitting", total=starts, unit="start") as bar:
        for k in range(starts):
            start = np.array(u0) if k == 0 else lo + rng.random(p) * (hi - lo)
            start = np.clip(start, lo + inner, hi - inner)
            t0 = time.perf_counter()
            res = least_squares(residuals, start, bounds=(lo, hi), method="trf", x_scale=1.0,
                                max_nfev=max_evaluations, xtol=1e-12, ftol=1e-12, gtol=1e-12)
            if k == 0 and starts > 1:
                _refuse_time(starts, time.perf_counter() - t0, budget, "the first start's time")
            if best is None or res.cost < best.cost:
                best = res
            bar.update(1)
    u = best.x
    r = residuals(u)
    J = _central_jacobian(residuals, u)
    dof = m_res - p
    result = {
        "parameters": dict(zip(free, np.exp(u).tolist())),
        "cost": 0.5 * float(r @ r),
        "n_residuals": m_res,
        "n_free": p,
        "fixed": {k: float(v) for k, v in zip(model.symbols, X[0])
                  if k not in free and k not in fixed_cols},
        "at_bounds": [q for q, x, a, b in zip(free, u, lo, hi) if x - a < 1e-6 or b - x < 1e-6],
        "success": bool(best.success),
        "message": str(best.message),
        "evaluations": int(best.nfev),
        "weighted": bool(sig_cols),
        "uncertainty_method": UNCERTAINTY_METHOD,
        "note": "best-fit parameters of the model; uncertainties are asymptotic (linearized) estimates",
    }
    if dof <= 0:
        result["residual_variance"] = None
        result["uncertainties"] = {q: None for q in free}
        result["log_uncertainties"] = {q: None for q in free}
        result["note"] += f"; {m_res} residuals for {p} parameters leave no degrees of freedom for uncertainties"
        return result
    s2 = float(r @ r) / dof
    JTJ = J.T @ J
    try:
        cond = np.linalg.cond(JTJ)
        cov = np.linalg.inv(JTJ) * s2 if np.isfinite(cond) and cond < 1e14 else None
    except np.linalg.LinAlgError:
        cov = None
    result["residual_variance"] = s2
    if cov is None:
        result["uncertainties"] = {q: None for q in free}
        result["log_uncertainties"] = {q: None for q in free}
        result["note"] += "; J^T J is singular: the parameters are not all identifiable from these data"
    else:
        su = np.sqrt(np.maximum(np.diag(cov), 0.0))
        result["log_uncertainties"] = dict(zip(free, su.tolist()))
        result["uncertainties"] = dict(zip(free, (np.exp(u) * su).tolist()))
        result["covariance_log"] = cov.tolist()
    return result


def _central_jacobian(fun, u, step: float = 1e-6) -> np.ndarray:
    cols = []
    for k in range(len(u)):
        e = np.zeros_like(u)
        e[k] = step
        cols.append((fun(u + e) - fun(u - e)) / (2 * step))
    return np.stack(cols, axis=1)
