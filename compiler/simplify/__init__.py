"""Simplifier passes and derivatives over the IR.

Passes (each ``Function → Function``, each usable alone): :func:`canonical`,
:func:`fold`, :func:`factor` (with :func:`horner` and :func:`pair_cse`),
:func:`normalize`; :func:`simplify` runs them in a fixed order and ends with
dead-row removal. Derivatives: :func:`differentiate` (Jacobian of an output
group) and :func:`input_derivatives` (first and second derivative along one
input).
"""

from .canonical import canonical
from .derivative import differentiate, input_derivatives
from .factor import factor, horner, pair_cse
from .fold import fold
from .normalize import normalize
from .pipeline import PASSES, simplify

__all__ = ["canonical", "fold", "factor", "horner", "pair_cse", "normalize", "simplify",
           "PASSES", "differentiate", "input_derivatives"]
