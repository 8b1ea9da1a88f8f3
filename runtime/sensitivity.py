"""Steady-state derivatives on the safe path, for rows the compiled Jacobian
cannot be trusted with.

The compiled Jacobian is the log form ∂p_i/∂log θ_j computed with relative
adjoints (see ``treeflux.compiler.simplify.derivative``): accurate to a few
ulps of p_i wherever the kernel's values are representable. Rows where they
are not — the steady-state guard sent the row to the looped elimination, or
a derivative came out non-finite — and plain derivatives at a symbol equal
to zero (a zero concentration: x ∂p/∂x carries no information there) are
computed here instead, one row at a time:

    A p = e_0,   A ∂p/∂θ_j = −(∂L/∂θ_j) p   (first row of A: Σ p = 1; ∂Σp = 0)

where A is the Laplacian L with its first row replaced by ones and
∂L/∂θ_j = Σ_e ∂ℓ_e/∂θ_j (e_target − e_source) e_sourceᵀ. The labels and
their gradients are evaluated from the label trees (dual numbers) and the
solve runs in mpmath, whose exponent range is unbounded (nothing under- or
overflows); the precision is doubled until two solves agree to 1e-15 of
each entry's natural size (p_i, or p_i/|θ_j| for the plain form). Cost:
O(n³ + n_symbols·n²) multiprecision operations a row — a slow path for rare
rows, refused above :data:`MAX_STATES` states.

mpmath comes with SymPy (a compiler dependency); without it these rows are
refused rather than returned unchecked.
"""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np

from .errors import EvaluationError

__all__ = ["jacobian_rows", "MAX_STATES"]

MAX_STATES = 200
_START_DPS = 40
_MAX_DPS = 40_000
_AGREE = 1e-15


def _dual(tree, theta, mp):
    """(value, gradient list) of one label tree at symbol values ``theta`` (mpf)."""
    op = tree[0]
    nsym = len(theta)
    if op == "num":
        return mp.mpf(Fraction(tree[1]).numerator) / Fraction(tree[1]).denominator, [0] * nsym
    if op == "sym":
        grad = [0] * nsym
        grad[tree[1]] = 1
        return theta[tree[1]], grad
    a, da = _dual(tree[1], theta, mp)
    if op == "neg":
        return -a, [-x for x in da]
    if op == "exp":
        v = mp.exp(a)
        return v, [v * x for x in da]
    if op == "log":
        if a <= 0:
            raise ValueError("log of a non-positive value")
        return mp.log(a), [x / a for x in da]
    if op == "sqrt":
        if a < 0:
            raise ValueError("sqrt of a negative value")
        v = mp.sqrt(a)
        return v, [x / (2 * v) for x in da]
    b, db = _dual(tree[2], theta, mp)
    if op == "add":
        return a + b, [x + y for x, y in zip(da, db)]
    if op == "sub":
        return a - b, [x - y for x, y in zip(da, db)]
    if op == "mul":
        return a * b, [x * b + a * y for x, y in zip(da, db)]
    if op == "div":
        return a / b, [(x * b - a * y) / (b * b) for x, y in zip(da, db)]
    if op == "pow":
        v = a ** b
        if tree[2][0] == "num":
            return v, [b * a ** (b - 1) * x for x in da]
        return v, [v * (y * mp.log(a) + b * x / a) for x, y in zip(da, db)]
    raise ValueError(f"unknown label operation {op!r}")


def _lu(A, mp):
    """In-place LU with partial pivoting (no singularity threshold: the
    precision loop decides what is trustworthy). Returns the permutation."""
    n = len(A)
    perm = list(range(n))
    for c in range(n):
        r = max(range(c, n), key=lambda i: abs(A[i][c]))
        if A[r][c] == 0:
            raise ZeroDivisionError
        A[c], A[r] = A[r], A[c]
        perm[c], perm[r] = perm[r], perm[c]
        inv = 1 / A[c][c]
        for i in range(c + 1, n):
            f = A[i][c] * inv
            if f:
                A[i][c] = f
                row_i, row_c = A[i], A[c]
                for k in range(c + 1, n):
                    row_i[k] -= f * row_c[k]
            else:
                A[i][c] = f
    return perm


def _solve(LU, perm, b):
    n = len(LU)
    y = [b[perm[i]] for i in range(n)]
    for i in range(n):
        s = y[i]
        row = LU[i]
        for k in range(i):
            s -= row[k] * y[k]
        y[i] = s
    for i in range(n - 1, -1, -1):
        s = y[i]
        row = LU[i]
        for k in range(i + 1, n):
            s -= row[k] * y[k]
        y[i] = s / row[i]
    return y


def _row(n, edges, trees, theta_row, columns, log, dps, mp):
    """(p, dp) at ``dps`` digits: dp[i][c] = derivative of p_i along columns[c]."""
    with mp.workdps(dps):
        theta = [mp.mpf(float(x)) for x in theta_row]
        A = [[mp.mpf(0)] * n for _ in range(n)]
        grads = []
        for (i, j), tree in zip(edges, trees):
            value, grad = _dual(tree, theta, mp)
            A[j][i] += value
            A[i][i] -= value
            grads.append(grad)
        A[0] = [mp.mpf(1)] * n
        LU = [row[:] for row in A]
        perm = _lu(LU, mp)
        p = _solve(LU, perm, [mp.mpf(1)] + [mp.mpf(0)] * (n - 1))
        dp = [[None] * len(columns) for _ in range(n)]
        for c, col in enumerate(columns):
            rhs = [mp.mpf(0)] * n
            for (i, j), grad in zip(edges, grads):
                g = grad[col]
                if g:
                    rhs[j] -= g * p[i]
                    rhs[i] += g * p[i]
            rhs[0] = mp.mpf(0)
            d = _solve(LU, perm, rhs)
            scale = theta[col] if log else 1
            for i in range(n):
                dp[i][c] = d[i] * scale
        return [float(x) for x in p], [[float(x) for x in r] for r in dp]


def jacobian_rows(n: int, edges, trees, X: np.ndarray, *, log: bool,
                  columns=None, where: str = "scheme") -> np.ndarray:
    """Derivatives of the steady state for every row of ``X`` on the safe path.

    Parameters
    ----------
    n, edges : the scheme's states count and (source, target) index pairs.
    trees : label trees, one per edge, in the runtime form of ModelInfo.label_trees.
    X : (R, n_symbols) symbol values.
    log : derivatives with respect to log θ (θ ∂p/∂θ) instead of θ.
    columns : symbol columns to differentiate along (default all).

    Returns
    -------
    (R, n, len(columns)) array.
    """
    try:
        import mpmath as mp
    except ImportError:  # pragma: no cover - mpmath ships with sympy
        raise EvaluationError(f"{where}: these rows need the multiprecision derivative path, "
                              "which needs mpmath; install mpmath") from None
    if n > MAX_STATES:
        raise EvaluationError(f"{where}: derivatives at these extreme rates need the multiprecision "
                              f"path, available up to {MAX_STATES} states (the scheme has {n})")
    X = np.asarray(X, dtype=np.float64)
    columns = list(range(X.shape[1])) if columns is None else list(columns)
    out = np.empty((X.shape[0], n, len(columns)))
    for r, row in enumerate(X):
        dps, prev = _START_DPS, None
        while True:
            try:
                p, dp = _row(n, edges, trees, row, columns, log, dps, mp)
            except ZeroDivisionError:  # an exactly zero pivot: singular for good
                raise EvaluationError(f"{where}: row {r}: the steady state is not unique at these rates "
                                      f"(several terminal components), so its derivatives are undefined") from None
            except ValueError as exc:
                raise EvaluationError(f"{where}: row {r}: a rate cannot be evaluated ({exc})") from None
            if prev is not None and _agree(prev, dp, p, row, columns, log):
                break
            prev = dp
            dps *= 2
            if dps > _MAX_DPS:
                raise EvaluationError(f"{where}: row {r}: derivatives did not settle at {_MAX_DPS} digits; "
                                      "the steady state is (nearly) not unique at these rates")
        out[r] = dp
    return out


def _agree(a, b, p, row, columns, log) -> bool:
    for i, (ra, rb) in enumerate(zip(a, b)):
        for c, (x, y) in enumerate(zip(ra, rb)):
            if x == y:  # also the same infinity: a value beyond float64, refused by the caller
                continue
            theta = abs(float(row[columns[c]]))
            natural = p[i] if log or theta == 0 else p[i] / theta
            tol = _AGREE * max(natural, abs(y)) if math.isfinite(natural) else _AGREE * abs(y)
            if not abs(x - y) <= tol:
                return False
    return True
