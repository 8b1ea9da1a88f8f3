"""Response curves: one observable as a function of one input.

For an observable f(x) = Σ_i w_i p_i(x) of one input x (every other symbol
fixed), over a range [LO, HI]:

- the curve is evaluated on a grid of the input: log-spaced when 0 < LO and
  the input is not signed, linear otherwise (a range reaching or crossing
  zero, or a signed input such as a voltage);
- **limits.** The observable's limits at the ends of the input's *domain* are
  sought beyond the range (:mod:`.response_domain`): [0, ∞) for a
  concentration, (−∞, ∞) for a signed input, (0, ∞) for a parameter. A
  concentration of exactly 0 is evaluated directly (its edges are absent).
  Other ends are approached on the subtraction-free compiled form, which
  stays accurate at extreme inputs, stepping outwards (half a decade or 1/8
  of the range width at first, then ever larger steps) until the end of
  float64 (1e±300) or until the model refuses the input or a rate
  overflows or turns negative — or, once past the dense steps (12 decades
  or 3 range widths), until the last three values agree and are not near 0
  (walking on would only repeat the limit; a limit of 0 is followed to the
  float64 edge): the limit is the farthest value, and it is *established* only when the
  last three values agree to ``max(1e-12 × span, 16 ε |f|)``. A limit that
  is not established is reported and never assumed: the curve is then
  normalized to the range and a warning says so. A change of the observable
  narrower than the spacing far out (beyond 12 decades, or 3 range widths on
  a linear axis, from the range) can be missed, and so can one that begins
  after the curve has settled there to the limit tolerance; none past
  1e±300 is seen;
- **normalization** ``"limits"`` (default): ŷ = (f − min L)/|L_hi − L_lo| for
  a monotone curve, so ŷ runs from 0 to 1 over the domain; ``"range"``:
  ŷ = (f − f_min)/(f_max − f_min) over the grid;
- **monotone** is judged on everything examined (range and tails) with a
  tolerance of ``max(1e-10 × span, 64 ε |f|)`` per step. A curve that is not
  monotone is reported with its ``peak`` (the extremum that lies beyond both
  limits, refined by golden section and then as a root of its derivative)
  and its rising and falling half-points
  (where f is halfway between the peak and the limit on that side); no EC
  levels, effective Hill coefficient or Hill fit are claimed for it;
- EC_q (q = 0.1, 0.5, 0.9) is the input where ŷ = q, bracketed on the grid
  and tails, then solved on the model (Illinois regula falsi in u = ln x or x);
- the effective Hill coefficient is n_H = ln 81 / ln(EC90/EC10)
  (Goldbeter & Koshland [1]_), defined for inputs that are not signed;
- slopes dŷ/dx and dŷ/d ln x are central differences of the model in u,
  maximized in magnitude over the range by a golden-section search around
  the steepest grid interval, to 1e-7 in u (``SLOPE_XTOL``); the log-slope is not defined for a signed input;
- a least-squares fit of the Hill function x^n/(K^n + x^n) [2]_ to ŷ gives a
  reference curve (on the range widened to cover EC10–EC90 and their width
  again on each side, so a cut range does not bend it); for a signed input,
  the logistic (Boltzmann) 1/(1 + exp(−(x − x_half)/s)) instead;
- ``saturated`` is true only when f at both ends of the range lies within
  ``SATURATION_TOLERANCE`` (1 %) of the span from its established limits.

Signs follow the normalized curve: a decreasing response has EC90 < EC10, a
negative n_H, negative slopes and a negative fitted n, as is common practice
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

from .errors import EvaluationError, TreefluxError
from .response_domain import Axis, check_in_domain, input_domain
from .response_fit import golden_max, hill_fit, illinois, logistic_fit

__all__ = ["response_curve", "response_summaries", "hill_fit", "LEVELS", "NORMALIZATIONS"]

LEVELS = (0.1, 0.5, 0.9)
NORMALIZATIONS = ("limits", "range")
# Central-difference step in u: (machine epsilon)^(1/3) balances the
# truncation error (∝ h²) against rounding (∝ eps/h); about 1e-10 relative.
FD_STEP = 6e-6
# Where the steepest slope lies is placed to this width in u (relative to the
# range width on a linear axis): the central-difference slope carries a relative
# error of ~1e-10, so its maximum is only defined to ~1e-5 in u; steps below
# 1e-7 change the reported maximum by < 1e-13 of itself.
SLOPE_XTOL = 1e-7
# A response whose span over the range is below this fraction of its size is flat.
FLAT_TOLERANCE = 1e-12
LIMIT_TOLERANCE = 1e-12        # agreement of the last tail values, relative to the span
MONOTONE_TOLERANCE = 1e-10     # allowed step against the direction, relative to the span
SATURATION_TOLERANCE = 0.01    # distance from a limit at a range end, relative to the span
_EPS = np.finfo(float).eps

NOTE = "model predictions of the scheme, not measurements"


# ------------------------------------------------------------------ selection

def _observable_weights(model, observable: str):
    """Weight vector over states for a state name; None for a declared
    observable (its weights may depend on the symbols); refuses other names."""
    names = tuple(model.observable_names)
    if observable in names:
        return None  # weights may be rate expressions, evaluated per row by model.observables
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
    """Validate an input range: finite numbers with lo < hi. Whether lo may
    be zero or negative depends on the input's domain
    (:func:`.response_domain.check_in_domain`)."""
    try:
        lo, hi = float(lo), float(hi)
    except (TypeError, ValueError):
        raise EvaluationError(f"range bounds must be numbers, got {lo!r} and {hi!r}") from None
    if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
        raise EvaluationError(f"bad range {lo:g}:{hi:g}: need finite bounds with LO < HI")
    return lo, hi


# ------------------------------------------------------------------ batch machinery

class _Curves:
    """Evaluates f and ŷ for many base rows at once: row r of ``base`` with
    the input column replaced by x. ``low``/``span`` normalize each row."""

    def __init__(self, model, base: np.ndarray, col: int, observable: str, axis: Axis):
        _observable_weights(model, observable)            # validates the name
        self.model, self.base, self.col, self.axis = model, base, col, axis
        names = tuple(model.observable_names)
        self.obs = names.index(observable) if observable in names else None
        self.state = None if self.obs is not None else model.states.index(observable)
        self.low = None
        self.span = None

    def raw(self, rows: np.ndarray, x: np.ndarray) -> np.ndarray:
        X = self.base[rows].copy()
        X[:, self.col] = x
        if self.obs is not None:
            return self.model.observables(X)[:, self.obs]
        return self.model.steady_state(X)[:, self.state]

    def safe_raw(self, rows: np.ndarray, x: np.ndarray) -> np.ndarray:
        """Like :meth:`raw`, with NaN where the model refuses a row or
        returns a non-finite value (rates overflowing far beyond the range)."""
        try:
            with np.errstate(all="ignore"):
                v = np.array(self.raw(rows, x), dtype=float)
                X = self.base[rows].copy()
                X[:, self.col] = x
                rates = self.model.labels(X)
            # a rate that overflowed or went negative out here ends the tail
            # whether or not the evaluation path noticed it
            v[~(np.isfinite(rates) & (rates >= 0)).all(axis=1)] = np.nan
        except TreefluxError:
            if len(rows) == 1:
                return np.full(1, np.nan)
            h = len(rows) // 2
            return np.concatenate([self.safe_raw(rows[:h], x[:h]), self.safe_raw(rows[h:], x[h:])])
        v[~np.isfinite(v)] = np.nan
        return v

    def tail(self, points: np.ndarray, settle_from: int, seen: np.ndarray) -> np.ndarray:
        """f at ``points`` (ordered outwards) for every row, NaN from a row's
        first refusal on (the domain or float64 ends there for that row).

        From point ``settle_from`` on (past the dense steps), a row stops
        once its last three values agree to ``max(1e-12 × span, 16 ε |f|)``
        of the values seen so far (``seen``, (N, k), and this tail): its
        limit is then established, and walking on to 1e±300 would only
        repeat it — at the price of the multiprecision recompute that rates
        near the float64 edges need. A row whose values are within that
        tolerance of 0 walks on, so a limit of 0 is reported as the value at
        the float64 edge (~0), not as the last small value. Span and size only grow as values are
        added, so a row stopped here is also established by
        :func:`_tail_limit` on everything examined."""
        N = len(self.base)
        F = np.full((N, len(points)), np.nan)
        alive = np.arange(N)
        with np.errstate(invalid="ignore"):
            hi, lo = np.nanmax(seen, axis=1), np.nanmin(seen, axis=1)
            big = np.nanmax(np.abs(seen), axis=1)
        for j, x in enumerate(points):
            if not len(alive):
                break
            v = self.safe_raw(alive, np.full(len(alive), x))
            F[alive, j] = v
            alive = alive[np.isfinite(v)]
            if not len(alive):
                break
            w = F[alive, j]
            hi[alive], lo[alive] = np.fmax(hi[alive], w), np.fmin(lo[alive], w)
            big[alive] = np.fmax(big[alive], np.abs(w))
            if j >= max(settle_from, 2):
                tol = np.maximum(LIMIT_TOLERANCE * (hi[alive] - lo[alive]), 16 * _EPS * big[alive])
                d1 = np.abs(w - F[alive, j - 1])
                d2 = np.abs(F[alive, j - 1] - F[alive, j - 2])
                alive = alive[~((d1 <= tol) & (d2 <= tol) & (np.abs(w) > tol))]
        return F

    def norm(self, rows: np.ndarray, u: np.ndarray) -> np.ndarray:
        """Normalized response at coordinates u."""
        return (self.raw(rows, self.axis.to_x(u)) - self.low[rows]) / self.span[rows]

    def step(self, u: np.ndarray) -> np.ndarray:
        if self.axis.log:
            return np.full(np.shape(u), FD_STEP)
        return np.full(np.shape(u), FD_STEP * (self.axis.hi - self.axis.lo) / 8.0)

    def slope(self, rows: np.ndarray, u: np.ndarray) -> np.ndarray:
        """dŷ/du by a central difference of the model (second-order one-sided
        where the central one would leave a domain that ends at x = 0)."""
        h = self.step(u)
        k = len(rows)
        fwd = np.zeros(k, dtype=bool) if self.axis.log or self.axis.domain == "signed" else u - h < 0
        f = np.flatnonzero(fwd)                 # the one-sided rows also need f(u)
        both = self.norm(np.concatenate([rows, rows, rows[f]]),
                         np.concatenate([u + h, np.where(fwd, u + 2 * h, u - h), u[f]]))
        up, other = both[:k], both[k:2 * k]
        d = (up - other) / (2.0 * h)
        if len(f):
            d[f] = (4.0 * up[f] - other[f] - 3.0 * both[2 * k:]) / (2.0 * h[f])
        return d


# ------------------------------------------------------------------ limits and shape

def _last_valid(F: np.ndarray) -> np.ndarray:
    """Per row, the number of leading finite entries of F."""
    if F.shape[1] == 0:
        return np.zeros(F.shape[0], dtype=int)
    bad = ~np.isfinite(F)
    return np.where(bad.any(axis=1), np.argmax(bad, axis=1), F.shape[1])


def _tail_limit(F: np.ndarray, x: np.ndarray, ftol: np.ndarray):
    """Farthest value of each tail (N, m) at points x (m,), where it was
    taken, and whether the last three values agree to ``ftol`` (the limit is
    then established)."""
    N = F.shape[0]
    if F.shape[1] < 3:
        return np.full(N, np.nan), np.full(N, np.nan), np.zeros(N, dtype=bool)
    n = _last_valid(F)
    r = np.arange(N)
    ok = n >= 3
    k = np.maximum(n, 3)
    last = np.where(n >= 1, F[r, np.maximum(n - 1, 0)], np.nan)
    at = np.where(n >= 1, x[np.maximum(n - 1, 0)], np.nan)
    d1 = np.abs(F[r, k - 1] - F[r, k - 2])
    d2 = np.abs(F[r, k - 2] - F[r, k - 3])
    return last, at, ok & (d1 <= ftol) & (d2 <= ftol)


def _ffill(S: np.ndarray) -> np.ndarray:
    """Forward-fill NaNs along rows (leading NaNs stay)."""
    idx = np.where(np.isfinite(S), np.arange(S.shape[1]), 0)
    np.maximum.accumulate(idx, axis=1, out=idx)
    out = S[np.arange(S.shape[0])[:, None], idx]
    return out


def _monotone(S: np.ndarray, tol: np.ndarray) -> np.ndarray:
    """Rows of S (NaN = not examined) that never step against one direction by more than tol."""
    with np.errstate(invalid="ignore"):
        d = np.diff(_ffill(S), axis=1)
    d = np.nan_to_num(d)
    return (d >= -tol[:, None]).all(axis=1) | (d <= tol[:, None]).all(axis=1)


def _extremum_count(S: np.ndarray, tol: float) -> int:
    """Number of interior extrema of one row (steps below tol ignored)."""
    v = S[np.isfinite(S)]
    d = np.diff(v)
    s = np.sign(d[np.abs(d) > tol])
    return int(np.count_nonzero(s[1:] != s[:-1])) if len(s) else 0


def _crossing(H: np.ndarray):
    """First interval j of each row where H changes sign (or touches 0)."""
    with np.errstate(invalid="ignore"):
        cross = (H[:, :-1] * H[:, 1:]) <= 0
    return cross.any(axis=1), np.argmax(cross, axis=1)


# ------------------------------------------------------------------ summaries

def response_summaries(model, base: np.ndarray, *, observable: str, input: str,
                       lo: float, hi: float, points: int = 61,
                       skip_flat: bool = False, normalization: str = "limits",
                       spacing: str = "auto") -> dict:
    """Response-curve summaries for many parameter sets at once.

    Parameters
    ----------
    model : CompiledModel
    base : (N, n_symbols) array
        Symbol values of each set; the input column is swept over [lo, hi].
    observable, input : str
        Observable (or state) name; symbol to sweep.
    lo, hi : float
        Range, lo < hi, inside the input's domain (see the module docstring).
    points : int
        Grid points (at least 5).
    skip_flat : bool
        Give NaN for rows whose response is flat instead of refusing.
    normalization : ``"limits"`` or ``"range"``
        Normalize to the observable's limits at the ends of the input's
        domain (rows whose limits cannot be established fall back to the
        range), or to its extremes over the range.
    spacing : ``"auto"``, ``"log"`` or ``"linear"``

    Returns
    -------
    dict
        (N,) arrays ``ec10``, ``ec50``, ``ec90``, ``hill_effective``,
        ``max_slope``, ``max_slope_at``, ``max_log_slope``,
        ``max_log_slope_at``, ``response_min``, ``response_max`` (over the
        grid), ``monotone`` (bool, over everything examined),
        ``monotone_in_range`` (bool), ``direction`` (+1, −1, 0),
        ``saturated`` (bool), ``limit_lower``, ``limit_upper`` (NaN when not
        established), ``limit_lower_ok``, ``limit_upper_ok`` (bool),
        ``by_limits`` (bool: normalized to the limits), ``low`` and ``span``
        (ŷ = (f − low)/span), ``unreached_lower``, ``unreached_upper``
        (distance of f at the range ends from the limits, relative to span),
        ``peak_x``, ``peak_y``, ``half_rising``, ``half_falling`` (NaN for
        monotone rows), ``peak_kind`` (+1 maximum, −1 minimum, 0 none),
        ``extrema`` (count); and the grid ``x`` (K,), raw ``y`` and
        normalized ``y_normalized`` (N, K), ``spacing`` ("log"/"linear"),
        ``domain`` and ``normalization`` (as requested).
    """
    lo, hi = check_range(lo, hi)
    if normalization not in NORMALIZATIONS:
        raise EvaluationError(f"normalization must be one of {', '.join(NORMALIZATIONS)}, "
                              f"got {normalization!r}")
    if int(points) != points or points < 5:
        raise EvaluationError(f"points must be an integer of at least 5, got {points!r}")
    points = int(points)
    col = _input_column(model, input)
    domain = input_domain(model, input)
    check_in_domain(lo, hi, input, domain)
    axis = Axis(spacing, lo, hi, domain)
    base = model.as_array(base)
    N = base.shape[0]
    curves = _Curves(model, base, col, observable, axis)
    grid = axis.grid(points)
    u_grid = axis.to_u(grid)
    Y = curves.raw(np.repeat(np.arange(N), points), np.tile(grid, N)).reshape(N, points)
    ymin, ymax = Y.min(axis=1), Y.max(axis=1)
    flat = ~(ymax - ymin > FLAT_TOLERANCE * np.maximum(np.abs(ymin), np.abs(ymax)))
    if flat.any() and not skip_flat:
        r = int(np.flatnonzero(flat)[0])
        raise EvaluationError(f"observable {observable!r} does not change with {input!r} over "
                              f"[{lo:g}, {hi:g}] (values between {ymin[r]:.17g} and {ymax[r]:.17g}"
                              f"{'' if N == 1 else f', parameter set {r}'}); nothing to normalize")
    # ------------------------------------------------ tails and limits
    lower_x, upper_x = axis.tail(-1), axis.tail(+1)
    TL = curves.tail(lower_x, axis.settle_from, Y)
    TU = curves.tail(upper_x, axis.settle_from, np.hstack([Y, TL]))
    seq_u = np.concatenate([axis.to_u(lower_x[::-1]), u_grid, axis.to_u(upper_x)])
    F = np.hstack([TL[:, ::-1], Y, TU])                    # ascending in x
    with np.errstate(invalid="ignore"):
        big = np.nanmax(np.abs(F), axis=1)
        spread = np.nanmax(F, axis=1) - np.nanmin(F, axis=1)
    ftol = np.maximum(LIMIT_TOLERANCE * spread, 16 * _EPS * big)
    L_lo, at_lo, ok_lo = _tail_limit(TL, lower_x, ftol)
    L_hi, at_hi, ok_hi = _tail_limit(TU, upper_x, ftol)
    if axis.lower_exact:                                   # x = 0 itself: edges absent
        f0 = Y[:, 0].copy() if lo <= 0 else curves.safe_raw(np.arange(N), np.zeros(N))
        ok0 = np.isfinite(f0)
        L_lo, at_lo = np.where(ok0, f0, L_lo), np.where(ok0, 0.0, at_lo)
        ok_lo = ok0 | ok_lo
    L_lo = np.where(ok_lo, L_lo, np.nan)
    L_hi = np.where(ok_hi, L_hi, np.nan)
    S = np.hstack([L_lo[:, None], F, L_hi[:, None]])
    with np.errstate(invalid="ignore"):
        smax, smin = np.nanmax(S, axis=1), np.nanmin(S, axis=1)
    mtol = np.maximum(MONOTONE_TOLERANCE * (smax - smin), 64 * _EPS * big)
    monotone = _monotone(S, mtol) & ~flat
    monotone_in_range = _monotone(Y, mtol) & ~flat
    by_limits = (ok_lo & ok_hi) if normalization == "limits" else np.zeros(N, dtype=bool)
    # ------------------------------------------------ extrema of curves that are not monotone
    out = {"peak_x": np.full(N, np.nan), "peak_y": np.full(N, np.nan),
           "half_rising": np.full(N, np.nan), "half_falling": np.full(N, np.nan),
           "peak_kind": np.zeros(N, dtype=int), "extrema": np.zeros(N, dtype=int)}
    bell = np.flatnonzero(~monotone & ~flat)
    if len(bell):
        _peaks(curves, bell, seq_u, F, L_lo, L_hi, out)
        out["extrema"][bell] = [_extremum_count(F[r], mtol[r]) for r in bell]
    # ------------------------------------------------ normalization
    use_mono = np.where(by_limits, monotone, monotone_in_range)
    with np.errstate(invalid="ignore"):
        pmax = np.fmax(smax, np.where(out["peak_kind"] > 0, out["peak_y"], -np.inf))
        pmin = np.fmin(smin, np.where(out["peak_kind"] < 0, out["peak_y"], np.inf))
    low = np.where(by_limits, np.where(monotone, np.fmin(L_lo, L_hi), pmin), ymin)
    span = np.where(by_limits, np.where(monotone, np.abs(L_hi - L_lo), pmax - pmin), ymax - ymin)
    span = np.where(flat | ~(span > 0), 1.0, span)
    curves.low, curves.span = low, span
    Yn = (Y - low[:, None]) / span[:, None]
    direction = np.where(by_limits, np.sign(L_hi - L_lo), np.sign(Y[:, -1] - Y[:, 0]))
    direction = np.where(flat, 0, np.nan_to_num(direction)).astype(int)
    out.update({"x": grid, "y": Y, "y_normalized": Yn, "monotone": monotone,
                "monotone_in_range": monotone_in_range, "direction": direction,
                "response_min": ymin, "response_max": ymax, "limit_lower": L_lo,
                "limit_upper": L_hi, "limit_lower_ok": ok_lo, "limit_upper_ok": ok_hi,
                "limit_lower_at": at_lo, "limit_upper_at": at_hi,
                "by_limits": by_limits, "low": low, "span": span, "spacing": axis.spacing,
                "domain": domain, "normalization": normalization})
    # ------------------------------------------------ EC levels: bracket, then solve
    ec_rows = np.flatnonzero(use_mono & ~flat)
    Fn = np.where(by_limits[:, None], (F - low[:, None]) / span[:, None], np.nan)
    Fn[:, len(lower_x):len(lower_x) + points] = Yn        # range rows search the grid only
    for q in LEVELS:
        ec = np.full(N, np.nan)
        if len(ec_rows):
            has, j = _crossing(Fn[ec_rows] - q)
            rows, j = ec_rows[has], j[has]
            if len(rows):
                h = Fn[rows] - q
                k = np.arange(len(rows))
                u = illinois(lambda rr, uu, q=q: curves.norm(rr, uu) - q, rows,
                              seq_u[j], seq_u[j + 1], h[k, j], h[k, j + 1])
                ec[rows] = axis.to_x(u)
        out[f"ec{int(round(100 * q))}"] = ec
    with np.errstate(divide="ignore", invalid="ignore"):
        hill = math.log(81.0) / np.log(out["ec90"] / out["ec10"])
    out["hill_effective"] = hill if domain != "signed" else np.full(N, np.nan)
    _slopes(curves, axis, grid, u_grid, Yn, ~flat, out)
    # ------------------------------------------------ saturation at the range ends
    with np.errstate(invalid="ignore"):
        dom_span = np.where(monotone, np.abs(L_hi - L_lo), pmax - pmin)
        gap_lo = np.abs(Y[:, 0] - L_lo) / dom_span
        gap_hi = np.abs(Y[:, -1] - L_hi) / dom_span
    out["unreached_lower"], out["unreached_upper"] = gap_lo, gap_hi
    out["saturated"] = (ok_lo & ok_hi & ~flat & (gap_lo <= SATURATION_TOLERANCE)
                        & (gap_hi <= SATURATION_TOLERANCE))
    return out


def _peaks(curves: _Curves, rows: np.ndarray, seq_u, F, L_lo, L_hi, out) -> None:
    """Peak (or trough) of each row in ``rows`` and its half-points, written
    into ``out``. The extremum is the one lying beyond both limits (farther
    out of the two); its half-points are where f is halfway between it and
    the limit on each side (the crossing nearest the peak)."""
    N = len(F)
    Fr = F[rows]
    fin = np.isfinite(Fr)
    i = np.arange(len(rows))
    first = Fr[i, np.argmax(fin, axis=1)]
    last = Fr[i, Fr.shape[1] - 1 - np.argmax(fin[:, ::-1], axis=1)]
    left = np.where(np.isfinite(L_lo[rows]), L_lo[rows], first)
    right = np.where(np.isfinite(L_hi[rows]), L_hi[rows], last)
    up = np.nanmax(Fr, axis=1) - np.maximum(left, right)
    down = np.minimum(left, right) - np.nanmin(Fr, axis=1)
    kind = np.zeros(N)
    kind[rows] = np.where(up >= down, 1.0, -1.0)
    k = np.nanargmax(kind[rows, None] * Fr, axis=1)
    ka = np.where(fin[i, np.maximum(k - 1, 0)], np.maximum(k - 1, 0), k)
    kb = np.where(fin[i, np.minimum(k + 1, Fr.shape[1] - 1)], np.minimum(k + 1, Fr.shape[1] - 1), k)
    a, b = seq_u[ka], seq_u[kb]

    def signed(rr, uu):
        with np.errstate(all="ignore"):
            v = kind[rr] * curves.safe_raw(rr, curves.axis.to_x(uu))
        return np.where(np.isfinite(v), v, -np.inf)

    u_best, v_best = golden_max(signed, rows, a, b)
    # golden section places a smooth extremum to about sqrt(eps); a root of the
    # central-difference derivative (Illinois) places it to about eps^(2/3)
    h = curves.step(u_best)
    h_full = np.zeros(N)
    h_full[rows] = h

    def slope(rr, uu):
        return (signed(rr, uu + h_full[rr]) - signed(rr, uu - h_full[rr])) / (2.0 * h_full[rr])

    ga, gb = slope(rows, a), slope(rows, b)
    sel = (ga > 0) & (gb < 0)
    if sel.any():
        u_best[sel] = illinois(slope, rows[sel], a[sel], b[sel], ga[sel], gb[sel])
        v_best[sel] = signed(rows[sel], u_best[sel])
    peak = kind[rows] * v_best
    out["peak_x"][rows] = curves.axis.to_x(u_best)
    out["peak_y"][rows] = peak
    out["peak_kind"][rows] = kind[rows].astype(int)
    # half-points: the last crossing before the peak, the first after it
    target = np.zeros(N)
    cols = np.arange(Fr.shape[1] - 1)
    for base, before in ((left, True), (right, False)):
        t = 0.5 * (base + peak)
        H = Fr - t[:, None]
        with np.errstate(invalid="ignore"):
            cross = (H[:, :-1] * H[:, 1:] <= 0) & ((cols[None, :] < k[:, None]) if before
                                                   else (cols[None, :] >= k[:, None]))
        has = cross.any(axis=1)
        j = (cross.shape[1] - 1 - np.argmax(cross[:, ::-1], axis=1)) if before else np.argmax(cross, axis=1)
        if not has.any():
            continue
        sub, j = np.flatnonzero(has), j[has]
        target[rows[sub]] = t[sub]
        u = illinois(lambda rr, uu: curves.raw(rr, curves.axis.to_x(uu)) - target[rr], rows[sub],
                      seq_u[j], seq_u[j + 1], H[sub, j], H[sub, j + 1])
        rising = (kind[rows[sub]] > 0) == before
        x = curves.axis.to_x(u)
        out["half_rising"][rows[sub[rising]]] = x[rising]
        out["half_falling"][rows[sub[~rising]]] = x[~rising]


def _slopes(curves: _Curves, axis: Axis, grid, u_grid, Yn, ok_mask, out) -> None:
    """Steepest dŷ/dx and dŷ/d ln x over the range (golden section in u)."""
    N, points = Yn.shape
    ok = np.flatnonzero(ok_mask)
    g = np.gradient(Yn[ok], u_grid, axis=1) if len(ok) else np.zeros((0, points))
    # d/dx and d/d ln x from d/du: u = ln x (log axis) or u = x (linear axis)
    transforms = {"max_log_slope": (lambda s, u: s) if axis.log else (lambda s, u: s * u),
                  "max_slope": (lambda s, u: s * np.exp(-u)) if axis.log else (lambda s, u: s)}
    for key, tr in transforms.items():
        at, val = np.full(N, np.nan), np.full(N, np.nan)
        if len(ok) and not (key == "max_log_slope" and axis.domain == "signed"):
            j = np.argmax(np.abs(tr(g, u_grid)), axis=1)
            a = u_grid[np.maximum(j - 1, 0)]
            b = u_grid[np.minimum(j + 1, points - 1)]

            def mag(rows, u, tr=tr):
                return np.abs(tr(curves.slope(rows, u), u))

            u_best, _ = golden_max(mag, ok, a, b, xtol=SLOPE_XTOL * (1.0 if axis.log else axis.hi - axis.lo))
            at[ok] = axis.to_x(u_best)
            val[ok] = tr(curves.slope(ok, u_best), u_best)
        out[key] = val
        out[key + "_at"] = at


# ------------------------------------------------------------------ one curve

def _num(v):
    v = float(v)
    return v if math.isfinite(v) else None


def response_curve(model, *, observable: str, input: str, lo: float, hi: float,
                   points: int = 61, values: dict | None = None,
                   normalization: str = "limits", spacing: str = "auto") -> dict:
    """Response of one observable to one input over [lo, hi].

    Parameters
    ----------
    model : CompiledModel
    observable : str
        An observable name (or a state name: its probability).
    input : str
        The symbol swept over the range (normally an input).
    lo, hi : float
        The range, lo < hi, inside the input's domain.
    points : int
        Grid points (≥ 5).
    values : dict, optional
        Values of the other symbols (name → number); missing ones take the
        model's values.
    normalization : ``"limits"`` (default) or ``"range"``
    spacing : ``"auto"`` (default), ``"log"`` or ``"linear"``

    Returns
    -------
    dict
        ``input``, ``observable``, ``range``, ``values`` (every symbol but the
        input), ``spacing``, ``domain``, ``normalization`` (what was used),
        ``limits`` (``lower``/``upper``: ``at``, ``value``, ``established``,
        ``evaluated_at``, ``how``), ``curve`` (``x``, ``y``, ``y_normalized``), ``direction``,
        ``monotone``, ``monotone_in_range``, ``response_min``,
        ``response_max``, ``ec10``, ``ec50``, ``ec90``, ``hill_effective``
        (ln 81 / ln(ec90/ec10)), ``max_slope``, ``max_slope_at``,
        ``max_log_slope``, ``max_log_slope_at``, ``hill_fit`` (``n``, ``K``,
        ``rms``), ``logistic_fit`` (signed inputs), ``peak`` (``x``, ``y``,
        ``kind``) and ``half_points`` (``rising``, ``falling``) when not
        monotone, ``saturated``, ``saturation_tolerance``, ``unreached``,
        ``warnings`` (list of sentences) and ``note``. Unavailable numbers
        are None. See the module docstring for the definitions and signs.

    Examples
    --------
    Single-site binding c/(K + c) gives n_H = 1, EC50 = K and EC90/EC10 = 81
    (Goldbeter & Koshland 1981) over any range, normalized to its limits.
    """
    values = dict(values or {})
    if input in values:
        raise EvaluationError(f"input {input!r} is swept over the range; do not also give it a value")
    for k, v in values.items():
        if np.ndim(v) != 0:
            raise EvaluationError(f"value of {k!r} must be a single number for one response curve")
    lo, hi = check_range(lo, hi)
    _input_column(model, input)
    check_in_domain(lo, hi, input, input_domain(model, input))
    base = model.as_array({**values, input: lo})
    s = response_summaries(model, base, observable=observable, input=input, lo=lo, hi=hi,
                           points=points, normalization=normalization, spacing=spacing)
    one = {k: (v[0] if isinstance(v, np.ndarray) and v.ndim >= 1 and len(v) == 1 else v)
           for k, v in s.items() if k not in ("x", "y", "y_normalized")}
    x, y, yn = s["x"], s["y"][0], s["y_normalized"][0]
    direction = {1: "increasing", -1: "decreasing", 0: "none"}[int(one["direction"])]
    monotone, by_limits = bool(one["monotone"]), bool(one["by_limits"])
    signed = s["domain"] == "signed"
    result = {
        "input": input,
        "observable": observable,
        "range": [lo, hi],
        "points": int(points),
        "spacing": s["spacing"],
        "domain": s["domain"],
        "values": {k: float(v) for k, v in zip(model.symbols, base[0]) if k != input},
        "normalization": "limits" if by_limits else "range",
        "limits": _limits_report(one, s["domain"]),
        "curve": {"x": x.tolist(), "y": y.tolist(), "y_normalized": yn.tolist()},
        "direction": direction,
        "monotone": monotone,
        "monotone_in_range": bool(one["monotone_in_range"]),
        "response_min": float(one["response_min"]),
        "response_max": float(one["response_max"]),
    }
    for key in ("ec10", "ec50", "ec90", "hill_effective", "max_slope", "max_slope_at",
                "max_log_slope", "max_log_slope_at"):
        result[key] = _num(one[key])
    result["hill_fit"] = None
    if result["ec50"] is not None:
        fit = _reference_fit(model, base, input, observable, one, x, yn, signed, by_limits)
        result["logistic_fit" if signed else "hill_fit"] = fit
    if not monotone:
        result["peak"] = {"x": _num(one["peak_x"]), "y": _num(one["peak_y"]),
                          "y_normalized": _num((one["peak_y"] - one["low"]) / one["span"]),
                          "kind": "maximum" if one["peak_kind"] > 0 else "minimum",
                          "in_range": bool(lo <= one["peak_x"] <= hi)}
        result["half_points"] = {"rising": _num(one["half_rising"]), "falling": _num(one["half_falling"])}
    result["saturated"] = bool(one["saturated"])
    result["saturation_tolerance"] = SATURATION_TOLERANCE
    result["unreached"] = {"lower": _num(one["unreached_lower"]), "upper": _num(one["unreached_upper"])}
    result["warnings"] = _warnings(result, one, normalization)
    result["note"] = (NOTE + "; normalized to " + (
        "its extremes over the range" if not by_limits else
        "the observable's limits at the ends of the input's domain" if monotone else
        "the observable's extremes over the domain (its limits and its peak)"))
    return result


def _reference_fit(model, base, input, observable, one, x, yn, signed, by_limits) -> dict:
    """Hill (or, for a signed input, logistic) fit to ŷ. Normalized to its
    limits, the curve is fitted on a grid spanning the range and the EC10–EC90
    band widened by its own width on each side, so a range that cuts the
    curve does not bend the reference; normalized to the range, on the grid."""
    ec10, ec50, ec90 = (float(one[k]) for k in ("ec10", "ec50", "ec90"))
    if by_limits and np.isfinite(ec10) and np.isfinite(ec90):
        a, b = sorted((ec10, ec90))
        if signed:
            lo, hi = min(x[0], a - (b - a)), max(x[-1], b + (b - a))
            xf = np.linspace(lo, hi, len(x))
        else:
            xf = np.geomspace(min(x[x > 0][0], a * a / b), max(x[-1], b * b / a), len(x))
        axis = Axis("linear" if signed else "log", xf[0], xf[-1], "signed" if signed else "positive")
        curves = _Curves(model, base, _input_column(model, input), observable, axis)
        curves.low, curves.span = np.array([one["low"]]), np.array([one["span"]])
        yf = curves.norm(np.zeros(len(xf), dtype=int), axis.to_u(xf))
    else:
        xf, yf = x, yn
    if signed:
        fit = logistic_fit(xf, yf, x0=ec50, s0=(ec90 - ec10) / (2.0 * math.log(9.0)))
    else:
        pos = xf > 0
        fit = hill_fit(xf[pos], yf[pos], n0=float(one["hill_effective"]), K0=ec50)
        xf = xf[pos]
    fit["window"] = [float(xf[0]), float(xf[-1])]
    return fit


def _limits_report(one: dict, domain: str) -> dict:
    ends = {"lower": "-inf" if domain == "signed" else "0", "upper": "+inf"}
    rep = {}
    for side in ("lower", "upper"):
        ok = bool(one[f"limit_{side}_ok"])
        exact = side == "lower" and domain == "non-negative" and ok
        rep[side] = {"at": ends[side], "value": _num(one[f"limit_{side}"]) if ok else None,
                     "established": ok, "evaluated_at": _num(one[f"limit_{side}_at"]),
                     "how": ("evaluated at 0 (edges with a zero rate removed)" if exact else
                             "converged far beyond the range" if ok else
                             "not established: the observable did not settle before the model "
                             "refused the input or float64 ran out")}
    return rep


def _warnings(r: dict, one: dict, normalization: str) -> list:
    """Every caveat of one curve, as sentences (printed by the CLI too)."""
    w = []
    lim = r["limits"]
    missing = [s for s in ("lower", "upper") if not lim[s]["established"]]
    if missing:
        w.append(f"the limit at the {' and '.join(missing)} end of the input's domain could not be "
                 "established" + ("; normalized to the range instead" if normalization == "limits" else "")
                 + "; saturation is unknown")
    elif not r["saturated"]:
        w.append(f"not saturated: the response at an end of the range is more than "
                 f"{100 * SATURATION_TOLERANCE:g}% of its span from its limit (lower "
                 f"{100 * (r['unreached']['lower'] or 0):.3g}%, upper {100 * (r['unreached']['upper'] or 0):.3g}%)"
                 + ("" if not r["monotone"] else
                    "; EC levels lie where the limits put them, widen the range to see them"
                    if r["normalization"] == "limits" else
                    "; EC levels and Hill coefficients are relative to this range: widen it"))
    if not r["monotone"]:
        p = r["peak"]
        w.append(f"not monotone: {p['kind']} of {p['y']:.6g} at {r['input']} = {p['x']:.6g}"
                 + ("" if p["in_range"] else " (outside the range)")
                 + "; no EC levels, effective Hill coefficient or Hill fit are given")
        if one["extrema"] > 1:
            w.append(f"{int(one['extrema'])} extrema: the peak reported is the largest excursion")
        if r["monotone_in_range"] and r["normalization"] == "range" and r["ec50"] is not None:
            w[-1] = w[-1].replace("no EC levels, effective Hill coefficient or Hill fit are given",
                                  "EC levels and Hill values describe the range only")
    if r["domain"] == "signed":
        w.append("signed input: the effective Hill coefficient and slopes in ln x are not defined; "
                 "see logistic_fit (x_half, slope_factor)")
    elif r["spacing"] == "linear" and r["range"][0] <= 0:
        w.append("the range starts at 0: the Hill fit and log-slopes use the points with x > 0")
    return w
