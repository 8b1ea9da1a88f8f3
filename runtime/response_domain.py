"""The input axis of a response curve: its domain, its spacing, and the
points beyond the scanned range where the limits of the observable are sought.

Domain of an input (decided here, documented in :mod:`.response`):

- ``"non-negative"`` — an input that is not declared signed (a
  concentration): [0, ∞). Zero is a valid value (the edges it multiplies are
  absent), so the limit at the lower end is evaluated exactly at 0.
- ``"positive"`` — a parameter swept as an input: (0, ∞); its lower limit is
  approached (it cannot be evaluated at 0).
- ``"signed"`` — a symbol declared with ``min < 0`` (a voltage, a free
  energy): (−∞, ∞). Its declared min/max bound the values the model is meant
  for, not the mathematics: the limits are the asymptotes at ±∞ (for a
  voltage-gated scheme, the G/Gmax convention of normalizing to the
  Boltzmann asymptotes).

Spacing: a log-spaced grid in x when 0 < LO and the input is not signed;
otherwise (a range that reaches or crosses zero, or a signed input) a linear
grid, since ln x is not defined there. The working coordinate u is ln x or x.
"""

from __future__ import annotations

import math

import numpy as np

from .errors import EvaluationError

DOMAINS = ("non-negative", "positive", "signed")
SPACINGS = ("auto", "log", "linear")
# Beyond the range: dense steps first (half a decade, or 1/8 of the range
# width), then ever larger ones up to the edge of float64.
_DENSE_STEPS = 24
_FAR = 1e300
_NEAR = 1e-300


def input_domain(model, name: str) -> str:
    """``"signed"``, ``"non-negative"`` or ``"positive"`` (see the module docstring)."""
    lo = (model.info.bounds.get(name) or (None, None))[0]
    if lo is not None and lo < 0:
        return "signed"
    return "non-negative" if name in model.info.inputs else "positive"


def check_in_domain(lo: float, hi: float, name: str, domain: str) -> None:
    if domain == "non-negative" and lo < 0:
        raise EvaluationError(f"bad range {lo:g}:{hi:g}: input {name!r} cannot be negative "
                              "(declare min < 0 in the model file for a signed input)")
    if domain == "positive" and lo <= 0:
        raise EvaluationError(f"bad range {lo:g}:{hi:g}: parameter {name!r} must be positive "
                              "(declare min < 0 in the model file for a signed symbol)")


class Axis:
    """The working coordinate u of a curve: u = ln x (``log``) or u = x (``linear``)."""

    def __init__(self, spacing: str, lo: float, hi: float, domain: str):
        if spacing not in SPACINGS:
            raise EvaluationError(f"spacing must be one of {', '.join(SPACINGS)}, got {spacing!r}")
        if spacing == "auto":
            spacing = "log" if lo > 0 and domain != "signed" else "linear"
        if spacing == "log" and lo <= 0:
            raise EvaluationError(f"bad range {lo:g}:{hi:g}: log spacing needs 0 < LO")
        self.log = spacing == "log"
        self.spacing = spacing
        self.lo, self.hi, self.domain = lo, hi, domain

    def to_x(self, u):
        return np.exp(u) if self.log else np.asarray(u, dtype=float)

    def to_u(self, x):
        return np.log(x) if self.log else np.asarray(x, dtype=float)

    def grid(self, points: int) -> np.ndarray:
        if self.log:
            return np.geomspace(self.lo, self.hi, points)
        return np.linspace(self.lo, self.hi, points)

    @property
    def lower_end(self) -> float:
        """The lower end of the domain: 0 or −∞."""
        return -math.inf if self.domain == "signed" else 0.0

    @property
    def lower_exact(self) -> bool:
        """True when the domain's lower end can be evaluated directly (x = 0)."""
        return self.domain == "non-negative"

    #: Index of the last dense tail point (either side): a curve may stop
    #: there once its limit is established (12 decades, or 3 range widths,
    #: examined at the dense spacing first).
    settle_from = _DENSE_STEPS - 1

    def tail(self, side: int) -> np.ndarray:
        """Points beyond the range on one side (−1 below, +1 above), ordered
        outwards, up to the edge of the domain or of float64."""
        if self.log:
            end = self.lo if side < 0 else self.hi
            u0, step = math.log(end), 0.5 * math.log(10.0)
            off = _offsets(step, abs(math.log(_NEAR if side < 0 else _FAR) - u0))
            return np.exp(u0 + side * off)
        if side < 0 and self.domain != "signed":
            if self.lo <= 0:
                return np.zeros(0)          # the range already starts at 0
            # approach 0 geometrically (x = 0 itself is evaluated separately)
            return self.lo * np.exp(-_offsets(0.5 * math.log(10.0), math.log(self.lo / _NEAR)))
        end = self.lo if side < 0 else self.hi
        width = self.hi - self.lo
        off = _offsets(width / 8.0, _FAR - abs(end), growth=10.0)
        return end + side * off


def _offsets(step: float, reach: float, growth: float = 2.0) -> np.ndarray:
    """step, 2·step, … (dense part), then growing by ``growth``, while below
    ``reach``; then ``reach`` itself."""
    if reach <= 0:
        return np.zeros(0)
    dense = step * np.arange(1, _DENSE_STEPS + 1)
    out = list(dense[dense < reach])
    d = step * _DENSE_STEPS
    while growth * d < reach:
        d *= growth
        out.append(d)
    if out and out[-1] < reach:
        out.append(reach)                     # the last point at the edge itself
    return np.array(out)
