"""Root finding, maximization and reference fits for response curves,
vectorized over many parameter sets (rows) at once; numpy only."""

from __future__ import annotations

import math

import numpy as np

__all__ = ["illinois", "golden_max", "hill_fit", "logistic_fit"]

_GOLDEN = (math.sqrt(5.0) - 1.0) / 2.0


# ------------------------------------------------------------------ solvers

def illinois(fun, rows, a, b, fa, fb, *, tol=1e-13, max_iter=100):
    """Roots of fun(rows, u) in brackets [a, b] (fa·fb ≤ 0), all rows at once.

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
        fu = fun(rows[idx], u)
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


def golden_max(fun, rows, a, b, *, iterations=60, xtol=0.0):
    """Maximize fun(rows, u) over u in [a, b] for every row (golden section),
    until every bracket is narrower than ``xtol`` or ``iterations`` steps."""
    a, b = np.array(a, dtype=float), np.array(b, dtype=float)
    x1 = b - _GOLDEN * (b - a)
    x2 = a + _GOLDEN * (b - a)
    f1, f2 = fun(rows, x1), fun(rows, x2)
    for _ in range(iterations):
        if xtol > 0 and not (b - a > xtol).any():
            break
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


# ------------------------------------------------------------------ reference fits

def _logistic_fit(u: np.ndarray, y: np.ndarray, *, n0: float, m0: float, max_iter: int = 200):
    """Least-squares fit of 1/(1 + exp(−n (u − m))) to (u, y), n of either sign.

    Levenberg–Marquardt on (n, m). Returns (n, m, rms)."""
    u = np.asarray(u, dtype=float)
    y = np.asarray(y, dtype=float)

    def model(theta):
        return 0.5 * (1.0 + np.tanh(0.5 * theta[0] * (u - theta[1])))  # logistic, overflow-free

    def jac(theta):
        H = model(theta)
        dH = H * (1.0 - H)
        return np.stack([dH * (u - theta[1]), -dH * theta[0]], axis=1)

    theta = np.array([n0 if np.isfinite(n0) and n0 != 0 else 1.0,
                      m0 if np.isfinite(m0) else float(np.median(u))])
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
    return float(theta[0]), float(theta[1]), float(math.sqrt(cost / len(y)))


def hill_fit(x: np.ndarray, y: np.ndarray, *, n0: float, K0: float, max_iter: int = 200) -> dict:
    """Least-squares fit of H(x) = x^n/(K^n + x^n) to (x, y), x > 0, n of either sign
    (H = 1/(1 + exp(−n (ln x − ln K)))). Returns ``n``, ``K``, ``rms``."""
    m0 = math.log(K0) if np.isfinite(K0) and K0 > 0 else math.nan
    n, m, rms = _logistic_fit(np.log(np.asarray(x, dtype=float)), y, n0=n0, m0=m0, max_iter=max_iter)
    return {"n": n, "K": float(math.exp(m)), "rms": rms}


def logistic_fit(x: np.ndarray, y: np.ndarray, *, x0: float, s0: float) -> dict:
    """Least-squares fit of 1/(1 + exp(−(x − x_half)/s)) (the Boltzmann form of a
    voltage-gated response). Returns ``x_half``, ``slope_factor`` (s), ``rms``."""
    n0 = 1.0 / s0 if np.isfinite(s0) and s0 != 0 else math.nan
    n, m, rms = _logistic_fit(x, y, n0=n0, m0=x0)
    return {"x_half": m, "slope_factor": 1.0 / n if n else math.inf, "rms": rms}
