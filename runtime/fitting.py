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
"""

from __future__ import annotations

import csv
import math
from pathlib import Path

import numpy as np

from .errors import EvaluationError

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
        with open(path, newline="") as fh:
            rows = list(csv.reader(fh))
    except OSError as exc:
        raise EvaluationError(f"cannot read {path}: {exc.strerror or exc}") from None
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


def fit(model, data, *, values=None, starts: int = 1, seed: int = 0,
        max_evaluations: int = 2000) -> dict:
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
    analytic = _has_jacobian(model, cols)

    def at(u):
        Xu = X.copy()
        Xu[:, free_idx] = np.exp(u)
        return Xu

    def residuals(u):
        Xu = at(u)
        P = model.steady_state(Xu)
        O = model.observables_from(Xu, P) if any(is_obs for is_obs, _, _ in cols) else None
        pred = np.concatenate([(O if is_obs else P)[mask, k] for is_obs, k, mask in cols])
        return (pred - Y) / S

    def jacobian(u):
        """∂r/∂ln θ of the free parameters from the compiled Jacobians."""
        Xu = at(u)
        Jp = model.jacobian(Xu) if any(not is_obs for is_obs, _, _ in cols) else None
        Jo = model.observable_jacobian(Xu) if any(is_obs for is_obs, _, _ in cols) else None
        rows = []
        for is_obs, k, mask in cols:
            D = (Jo if is_obs else Jp)[:, k, :][:, free_idx]
            if not model.info.log_jacobian:
                D = D * Xu[:, free_idx]
            rows.append(D[mask])
        return np.concatenate(rows) / S[:, None]

    lo = np.log([model.info.bounds[q][0] for q in free])
    hi = np.log([model.info.bounds[q][1] for q in free])
    inner = 1e-9 * (hi - lo)
    u0 = []
    for q, a, b in zip(free, lo, hi):
        v = model.info.defaults.get(q)
        u0.append(math.log(v) if v is not None else 0.5 * (a + b))
    rng = np.random.default_rng(seed)
    candidates = [np.array(u0)] + [lo + rng.random(p) * (hi - lo) for _ in range(max(0, int(starts) - 1))]
    best = None
    for start in candidates:
        start = np.clip(start, lo + inner, hi - inner)
        res = least_squares(residuals, start, jac=jacobian if analytic else "2-point",
                            bounds=(lo, hi), method="trf", x_scale=1.0,
                            max_nfev=max_evaluations, xtol=1e-12, ftol=1e-12, gtol=1e-12)
        if best is None or res.cost < best.cost:
            best = res
    u = best.x
    r = residuals(u)
    J = jacobian(u) if analytic else _central_jacobian(residuals, u)
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
        "jacobian": "compiled" if analytic else "central differences",
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
