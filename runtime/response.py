"""Response curves: one observable as a function of one input.

For an observable f(c) = Σ_i w_i p_i(c) of one input c (every other symbol
fixed), over a range [lo, hi] with 0 < lo < hi:

- the curve is evaluated on a log-spaced grid of the input;
- it is normalized to [0, 1] over the range: ŷ(c) = (f(c) − f_min)/(f_max − f_min);
- EC_q (q = 0.1, 0.5, 0.9) is the input where ŷ = q, bracketed on the grid and
  then solved on the model itself (Illinois regula falsi in ln c);
- the effective Hill coefficient is n_H = ln 81 / ln(EC90/EC10)
  (Goldbeter & Koshland [1]_); it is 1 for single-site binding c/(K + c);
- the slopes dŷ/dc and dŷ/d ln c are central differences of the model in
  ln c, maximized in magnitude by a golden-section search around the
  steepest grid interval;
- a least-squares fit of the Hill function c^n/(K^n + c^n) [2]_ to ŷ on the
  grid gives a reference curve.

Signs follow the normalized curve: a decreasing response has EC90 < EC10, a
negative n_H, negative slopes and a negative fitted n (the Hill function
with n < 0 is 1 minus the Hill function with |n|), as is common practice
for inhibition curves. All numbers are predictions of the model, not
measurements.

References
----------
.. [1] A. Goldbeter, D. E. Koshland Jr., "An amplified sensitivity arising
   from covalent modification in biological systems", PNAS 78 (1981)
   6840–6844.
.. [2] A. V. Hill, "The possible effects of the aggregation of the molecules
   of haemoglobin on its dissociation curves", J. Physiol. 40 (1910) iv–vii.
"""

from __future__ import annotations

import math

import numpy as np

from .errors import EvaluationError

__all__ = ["response_curve", "response_summaries", "LEVELS"]

LEVELS = (0.1, 0.5, 0.9)
# Central-difference step in ln c: (machine epsilon)^(1/3) balances the
# truncation error (∝ h²) against rounding (∝ eps/h); about 1e-10 relative.
FD_STEP = 6e-6
# A response whose span over the range is below this fraction of its size is flat.
FLAT_TOLERANCE = 1e-12
SATURATION_FRACTION = 0.05  # end log-slope / steepest log-slope above which a curve is cut
_GOLDEN = (math.sqrt(5.0) - 1.0) / 2.0

NOTE = "model predictions of the scheme, not measurements"


# ------------------------------------------------------------------ selection

def _observable_weights(model, observable: str) -> np.ndarray:
    """Weight vector over states for an observable name or a state name."""
    names = tuple(model.observable_names)
    if observable in names:
        return np.ascontiguousarray(model.observable_weights[:, names.index(observable)])
    if observable in model.states:
        w = np.zeros(len(model.states))
        w[model.states.index(observable)] = 1.0
        return w
    obs = ", ".join(names) if names else "(none declared)"
    raise EvaluationError(f"unknown observable {observable!r}; observables: {obs}; "
                          f"states: {', '.join(model.states)}")


def _input_column(model, name: str) -> int:
    symbols = tuple(model.symbols)
    if name not in symbols:
        inputs = ", ".join(model.info.inputs) or "(none declared)"
        raise EvaluationError(f"unknown input {name!r}; inputs: {inputs}; "
                              f"all symbols: {', '.join(symbols)}")
    return symbols.index(name)


def check_range(lo, hi) -> tuple[float, float]:
    """Validate an input range: finite numbers with 0 < lo < hi."""
    try:
        lo, hi = float(lo), float(hi)
    except (TypeError, ValueError):
        raise EvaluationError(f"range bounds must be numbers, got {lo!r} and {hi!r}") from None
    if not (math.isfinite(lo) and math.isfinite(hi) and 0.0 < lo < hi):
        raise EvaluationError(f"bad range {lo:g}:{hi:g}: need finite bounds with 0 < LO < HI")
    return lo, hi


# ------------------------------------------------------------------ batch machinery

class _Curves:
    """Evaluates ŷ for many base rows at once: row r of ``base`` with the
    input column replaced by c. ``ymin``/``span`` normalize each row."""

    def __init__(self, model, base: np.ndarray, col: int, weights: np.ndarray):
        self.model = model
        self.base = base
        self.col = col
        self.weights = weights
        self.ymin = None
        self.span = None

    def raw(self, rows: np.ndarray, c: np.ndarray) -> np.ndarray:
        X = self.base[rows].copy()
        X[:, self.col] = c
        return self.model.steady_state(X) @ self.weights

    def norm(self, rows: np.ndarray, u: np.ndarray) -> np.ndarray:
        """Normalized response at inputs c = exp(u)."""
        return (self.raw(rows, np.exp(u)) - self.ymin[rows]) / self.span[rows]

    def log_slope(self, rows: np.ndarray, u: np.ndarray) -> np.ndarray:
        """dŷ/d ln c by a central difference of the model."""
        h = FD_STEP
        both = self.norm(np.concatenate([rows, rows]), np.concatenate([u + h, u - h]))
        k = len(rows)
        return (both[:k] - both[k:]) / (2.0 * h)


def _illinois(curves: _Curves, rows, a, b, fa, fb, level, *, tol=1e-13, max_iter=100):
    """Roots of ŷ(e^u) − level in brackets [a, b] (fa·fb ≤ 0), all rows at once.

    Illinois variant of regula falsi (Dowell & Jarratt, BIT 11 (1971) 168–174):
    superlinear, keeps the bracket, never leaves it.
    """
    a, b, fa, fb = (np.array(v, dtype=float) for v in (a, b, fa, fb))
    root = np.where(fa == 0, a, np.where(fb == 0, b, np.nan))
    active = np.isnan(root)
    side = np.zeros(len(a), dtype=int)
    for _ in range(max_iter):
        if not active.any():
            break
        idx = np.flatnonzero(active)
        denom = fb[idx] - fa[idx]
        safe = np.where(denom != 0, denom, 1.0)
        u = np.where(denom != 0, (a[idx] * fb[idx] - b[idx] * fa[idx]) / safe, 0.5 * (a[idx] + b[idx]))
        u = np.clip(u, np.minimum(a[idx], b[idx]), np.maximum(a[idx], b[idx]))
        fu = curves.norm(rows[idx], u) - level
        same_a = np.sign(fu) == np.sign(fa[idx])
        # replace the endpoint on the side of fu; halve the kept one if it is kept twice
        ia, ib = idx[same_a], idx[~same_a]
        a[ia], fa[ia] = u[same_a], fu[same_a]
        fb[ia] = np.where(side[ia] == -1, 0.5 * fb[ia], fb[ia])
        side[ia] = -1
        b[ib], fb[ib] = u[~same_a], fu[~same_a]
        fa[ib] = np.where(side[ib] == 1, 0.5 * fa[ib], fa[ib])
        side[ib] = 1
        done = (fu == 0) | (np.abs(b[idx] - a[idx]) <= tol * np.maximum(1.0, np.abs(u)))
        root[idx[done]] = u[done]
        active[idx[done]] = False
    left = np.flatnonzero(active)
    root[left] = 0.5 * (a[left] + b[left])
    return root


def _golden_max(fun, rows, a, b, *, iterations=60):
    """Maximize fun(rows, u) over u in [a, b] for every row (golden section)."""
    a, b = np.array(a, dtype=float), np.array(b, dtype=float)
    x1 = b - _GOLDEN * (b - a)
    x2 = a + _GOLDEN * (b - a)
    f1, f2 = fun(rows, x1), fun(rows, x2)
    for _ in range(iterations):
        left = f1 >= f2           # maximum lies in [a, x2]
        b = np.where(left, x2, b)
        a = np.where(left, a, x1)
        x2n = np.where(left, x1, a + _GOLDEN * (b - a))
        x1n = np.where(left, b - _GOLDEN * (b - a), x2)
        f2n = np.where(left, f1, np.nan)
        f1n = np.where(left, np.nan, f2)
        x1, x2 = x1n, x2n
        new = np.where(left, x1, x2)
        fnew = fun(rows, new)
        f1 = np.where(left, fnew, f1n)
        f2 = np.where(left, f2n, fnew)
    # the endpoints (range boundaries) may hold the maximum of a monotone slope
    cand = np.stack([a, x1, x2, b])
    vals = np.stack([fun(rows, a), f1, f2, fun(rows, b)])
    best = np.argmax(vals, axis=0)
    k = np.arange(len(rows))
    return cand[best, k], vals[best, k]


def response_summaries(model, base: np.ndarray, *, observable: str, input: str,
                       lo: float, hi: float, points: int = 61,
                       skip_flat: bool = False) -> dict:
    """Response-curve summaries for many parameter sets at once.

    Parameters
    ----------
    model : CompiledModel
    base : (N, n_symbols) array
        Symbol values of each set; the input column is swept over [lo, hi].
    observable, input : str
        Observable (or state) name; symbol to sweep.
    lo, hi : float
        Range, 0 < lo < hi.
    points : int
        Log-spaced grid points (at least 5).
    skip_flat : bool
        Give NaN for rows whose response is flat instead of refusing.

    Returns
    -------
    dict of (N,) arrays
        ``ec10``, ``ec50``, ``ec90``, ``hill_effective``, ``max_slope``,
        ``max_slope_at``, ``max_log_slope``, ``max_log_slope_at``,
        ``response_min``, ``response_max``, ``monotone`` (bool),
        ``direction`` (+1, −1, or 0 when the ends are equal) and the grid
        ``x`` (K,), raw ``y`` and normalized ``y_normalized`` (N, K).
    """
    lo, hi = check_range(lo, hi)
    if int(points) != points or points < 5:
        raise EvaluationError(f"points must be an integer of at least 5, got {points!r}")
    points = int(points)
    weights = _observable_weights(model, observable)
    col = _input_column(model, input)
    base = model.as_array(base)
    N = base.shape[0]
    curves = _Curves(model, base, col, weights)
    grid = np.geomspace(lo, hi, points)
    u_grid = np.log(grid)
    rows_all = np.repeat(np.arange(N), points)
    Y = curves.raw(rows_all, np.tile(grid, N)).reshape(N, points)
    ymin, ymax = Y.min(axis=1), Y.max(axis=1)
    span = ymax - ymin
    flat = ~(span > FLAT_TOLERANCE * np.maximum(np.abs(ymin), np.abs(ymax)))
    if flat.any() and not skip_flat:
        r = int(np.flatnonzero(flat)[0])
        raise EvaluationError(f"observable {observable!r} does not change with {input!r} over "
                              f"[{lo:g}, {hi:g}] (values between {ymin[r]:.17g} and {ymax[r]:.17g}"
                              f"{'' if N == 1 else f', parameter set {r}'}); nothing to normalize")
    curves.ymin = ymin
    curves.span = np.where(flat, 1.0, span)
    Yn = (Y - ymin[:, None]) / curves.span[:, None]
    d = np.diff(Y, axis=1)
    tol = 1e-10 * curves.span[:, None]
    monotone = (d >= -tol).all(axis=1) | (d <= tol).all(axis=1)
    direction = np.sign(Y[:, -1] - Y[:, 0]).astype(int)
    ok = np.flatnonzero(~flat)
    out = {"x": grid, "y": Y, "y_normalized": Yn, "monotone": monotone & ~flat,
           "direction": np.where(flat, 0, direction),
           "response_min": ymin, "response_max": ymax}
    # ------------------------------------------------ EC levels: bracket, then solve
    for q in LEVELS:
        ec = np.full(N, np.nan)
        h = Yn[ok] - q
        s = np.sign(h)
        cross = s[:, :-1] * s[:, 1:] <= 0
        has = cross.any(axis=1)
        j = np.argmax(cross, axis=1)
        rows = ok[has]
        j = j[has]
        if len(rows):
            k = np.arange(len(ok))[has]
            u = _illinois(curves, rows, u_grid[j], u_grid[j + 1], h[k, j], h[k, j + 1], q)
            ec[rows] = np.exp(u)
        out[f"ec{int(round(100 * q))}"] = ec
    with np.errstate(divide="ignore", invalid="ignore"):
        out["hill_effective"] = math.log(81.0) / np.log(out["ec90"] / out["ec10"])
    # ------------------------------------------------ steepest slopes
    for key, scale in (("max_log_slope", False), ("max_slope", True)):
        at = np.full(N, np.nan)
        val = np.full(N, np.nan)
        if len(ok):
            g = np.gradient(Yn[ok], u_grid, axis=1)
            if scale:
                g = g / grid
            j = np.argmax(np.abs(g), axis=1)
            a = u_grid[np.maximum(j - 1, 0)]
            b = u_grid[np.minimum(j + 1, points - 1)]

            def mag(rows, u, scale=scale):
                sl = curves.log_slope(rows, u)
                return np.abs(sl * np.exp(-u) if scale else sl)

            u_best, _ = _golden_max(mag, ok, a, b)
            slope = curves.log_slope(ok, u_best)
            if scale:
                slope = slope * np.exp(-u_best)
            at[ok] = np.exp(u_best)
            val[ok] = slope
        out[key] = val
        out[key + "_at"] = at
    # ------------------------------------------------ saturation at the range ends
    # If the normalized response still climbs at an end of the range, the
    # range cuts the curve: ec levels and Hill coefficients then describe the
    # range as much as the scheme. Flag it (end log-slopes above 5% of the
    # steepest one).
    end = np.maximum(np.abs(Yn[:, 1] - Yn[:, 0]) / (u_grid[1] - u_grid[0]),
                     np.abs(Yn[:, -1] - Yn[:, -2]) / (u_grid[-1] - u_grid[-2]))
    out["saturated"] = (end <= SATURATION_FRACTION * np.abs(out["max_log_slope"])) & ~flat
    return out


# ------------------------------------------------------------------ Hill fit

def hill_fit(x: np.ndarray, y: np.ndarray, *, n0: float, K0: float, max_iter: int = 200) -> dict:
    """Least-squares fit of H(c) = c^n/(K^n + c^n) to (x, y), n of either sign.

    Levenberg–Marquardt on (n, ln K), writing H = 1/(1 + exp(−n (ln c − ln K))).
    Returns ``n``, ``K`` and ``rms`` (root-mean-square residual).
    """
    u = np.log(np.asarray(x, dtype=float))
    y = np.asarray(y, dtype=float)

    def model(theta):
        z = theta[0] * (u - theta[1])
        return 0.5 * (1.0 + np.tanh(0.5 * z))          # logistic, overflow-free

    def jac(theta):
        H = model(theta)
        dH = H * (1.0 - H)
        return np.stack([dH * (u - theta[1]), -dH * theta[0]], axis=1)

    theta = np.array([n0 if np.isfinite(n0) and n0 != 0 else 1.0,
                      math.log(K0) if np.isfinite(K0) and K0 > 0 else float(np.median(u))])
    r = model(theta) - y
    cost = float(r @ r)
    lam = 1e-3
    small = False
    for _ in range(max_iter):
        J = jac(theta)
        A = J.T @ J
        g = J.T @ r
        improved = False
        for _ in range(30):
            try:
                step = np.linalg.solve(A + lam * np.diag(np.diag(A) + 1e-300), -g)
            except np.linalg.LinAlgError:
                break
            trial = theta + step
            rt = model(trial) - y
            ct = float(rt @ rt)
            if ct < cost:
                improved = True
                small = (abs(cost - ct) <= 1e-15 * max(cost, 1e-300)
                         or bool(np.all(np.abs(step) <= 1e-13 * (1 + np.abs(theta)))))
                theta, r, cost = trial, rt, ct
                lam = max(lam / 10.0, 1e-12)
                break
            lam *= 10.0
        if not improved or small:
            break
    return {"n": float(theta[0]), "K": float(math.exp(theta[1])),
            "rms": float(math.sqrt(cost / len(y)))}


# ------------------------------------------------------------------ one curve

def _num(v):
    v = float(v)
    return v if math.isfinite(v) else None



def response_curve(model, *, observable: str, input: str, lo: float, hi: float,
                   points: int = 61, values: dict | None = None) -> dict:
    """Response of one observable to one input over [lo, hi].

    Parameters
    ----------
    model : CompiledModel
    observable : str
        An observable name (or a state name: its probability).
    input : str
        The symbol swept over the range (normally an input).
    lo, hi : float
        The range, 0 < lo < hi; the grid is log-spaced.
    points : int
        Grid points (≥ 5).
    values : dict, optional
        Values of the other symbols (name → number); missing ones take the
        model's values.

    Returns
    -------
    dict
        ``input``, ``observable``, ``range``, ``values`` (every symbol but the
        input), ``curve`` (``x``, ``y``, ``y_normalized``), ``direction``,
        ``monotone``, ``response_min``, ``response_max``, ``ec10``, ``ec50``,
        ``ec90``, ``hill_effective`` (ln 81 / ln(ec90/ec10)), ``max_slope``,
        ``max_slope_at``, ``max_log_slope``, ``max_log_slope_at`` (slopes of
        the normalized response, d/dc and d/d ln c), ``hill_fit`` (``n``,
        ``K``, ``rms``) and ``note``. See the module docstring for the
        definitions and signs.

    Examples
    --------
    For single-site binding c/(K + c) over a wide range, n_H ≈ 1 and
    ec90/ec10 ≈ 81 (Goldbeter & Koshland 1981).
    """
    values = dict(values or {})
    if input in values:
        raise EvaluationError(f"input {input!r} is swept over the range; do not also give it a value")
    for k, v in values.items():
        if np.ndim(v) != 0:
            raise EvaluationError(f"value of {k!r} must be a single number for one response curve")
    lo, hi = check_range(lo, hi)
    _input_column(model, input)
    base = model.as_array({**values, input: lo})
    s = response_summaries(model, base, observable=observable, input=input,
                           lo=lo, hi=hi, points=points)
    x, y, yn = s["x"], s["y"][0], s["y_normalized"][0]
    direction = {1: "increasing", -1: "decreasing", 0: "none"}[int(s["direction"][0])]
    monotone = bool(s["monotone"][0])
    fit = hill_fit(x, yn, n0=float(s["hill_effective"][0]), K0=float(s["ec50"][0]))
    result = {
        "input": input,
        "observable": observable,
        "range": [lo, hi],
        "points": int(points),
        "values": {k: float(v) for k, v in zip(model.symbols, base[0]) if k != input},
        "curve": {"x": x.tolist(), "y": y.tolist(), "y_normalized": yn.tolist()},
        "direction": direction,
        "monotone": monotone,
        "response_min": float(s["response_min"][0]),
        "response_max": float(s["response_max"][0]),
    }
    for key in ("ec10", "ec50", "ec90", "hill_effective", "max_slope", "max_slope_at",
                "max_log_slope", "max_log_slope_at"):
        result[key] = _num(s[key][0])
    result["hill_fit"] = fit
    result["saturated"] = bool(s["saturated"][0])
    note = ("model predictions of the scheme, not measurements; the response is normalized "
            "to [0, 1] over the range (min to max)")
    if not result["saturated"]:
        note += ("; the response is still changing at an end of the range, so ec levels and "
                 "Hill coefficients are relative to this range: widen it")
    if not monotone:
        note += "; it is not monotone over the range, so ec10/ec50/ec90 are first crossings"
    result["note"] = note
    return result
