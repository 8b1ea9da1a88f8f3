"""Benchmarks of the looped subtraction-free elimination (treeflux.runtime.numeric).

Run: ``python -m pytest benches/bench_numeric.py -q`` (pytest-benchmark).

Each scheme is timed against the solver a user would reach for on the same
Laplacian in the same run — scipy.sparse.linalg.spsolve, one sparse solve per
parameter set (assembly included), and numpy's batched dense solve where n is
small — and the ratio is stored with fill, flops and ns per set in
``extra_info``. No timed assertions: speed goals are read off the report.
Goals (per parameter set): 100×100 lattice < 50 ms and < 2 GiB; random
1,000-state scheme < 20 ms; Q4 ≤ 158 ns; random 200 states / 600 edges ≤ 23 µs.
"""

from __future__ import annotations

import math
import resource
import time

import mpmath
import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as sla

import treeflux.runtime.numeric as numeric
from treeflux.runtime.numeric import EliminationPlan

# ------------------------------------------------------------------ schemes


def lattice(a, b):
    """a×b grid; each state moves to its 4 neighbours, each move its own rate."""
    edges = []
    for r in range(a):
        for c in range(b):
            s = r * b + c
            if c + 1 < b:
                edges += [(s, s + 1), (s + 1, s)]
            if r + 1 < a:
                edges += [(s, s + b), (s + b, s)]
    return a * b, edges


def hypercube(d):
    n = 1 << d
    return n, [(s, s ^ (1 << k)) for s in range(n) for k in range(d)]


def random_scheme(n, m, seed):
    """Strongly connected: a random Hamiltonian cycle plus random chords."""
    rng = np.random.default_rng(seed)
    perm = rng.permutation(n)
    edges = {(int(perm[i]), int(perm[(i + 1) % n])) for i in range(n)}
    while len(edges) < m:
        i, j = rng.integers(n, size=2)
        if i != j:
            edges.add((int(i), int(j)))
    return n, sorted(edges)


SCHEMES = {
    # name: (builder, parameter sets timed, goal in ns per set)
    "Q4": (lambda: hypercube(4), 100_000, 158),
    "random200": (lambda: random_scheme(200, 600, 1), 2_048, 23_000),
    "random1000": (lambda: random_scheme(1000, 3000, 2), 64, 20_000_000),
    "lattice100": (lambda: lattice(100, 100), 16, 50_000_000),
}
_PLANS: dict = {}


def plan_for(name):
    if name not in _PLANS:
        n, edges = SCHEMES[name][0]()
        t0 = time.perf_counter()
        plan = EliminationPlan(n, edges)
        _PLANS[name] = (n, edges, plan, time.perf_counter() - t0)
    return _PLANS[name]


def rates_for(m, count, seed=0, lo=1e-3, hi=1e3):
    rng = np.random.default_rng(seed)
    return 10.0 ** rng.uniform(math.log10(lo), math.log10(hi), size=(count, m))


# ---------------------------------------------------------------- baselines


def best_time(fn, *, repeat=3, budget=2.0):
    """Best wall time of ``fn()`` over a few runs (stops early past ``budget`` s)."""
    best, spent = math.inf, 0.0
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        dt = time.perf_counter() - t0
        best, spent = min(best, dt), spent + dt
        if spent > budget:
            break
    return best


def spsolve_all(n, edges, rates):
    """scipy: assemble the Laplacian, replace row 0 by Σp = 1, spsolve; per set."""
    e = np.asarray(edges)
    rhs = np.zeros(n)
    rhs[0] = 1.0
    out = np.empty((rates.shape[0], n))
    for row, r in enumerate(rates):
        L = sp.csr_matrix((r, (e[:, 1], e[:, 0])), shape=(n, n))
        L = (L - sp.diags(np.asarray(L.sum(axis=0)).ravel())).tolil()
        L[0, :] = 1.0
        out[row] = sla.spsolve(L.tocsc(), rhs)
    return out


def dense_all(n, edges, rates):
    """numpy: batched dense solve, assembly included."""
    e = np.asarray(edges)
    N = rates.shape[0]
    L = np.zeros((N, n, n))
    np.add.at(L, (slice(None), e[:, 1], e[:, 0]), rates)
    L[:, np.arange(n), np.arange(n)] -= L.sum(axis=1)
    L[:, 0, :] = 1.0
    rhs = np.zeros((N, n, 1))
    rhs[:, 0, 0] = 1.0
    return np.linalg.solve(L, rhs)[..., 0]


# -------------------------------------------------------------------- speed


@pytest.mark.parametrize("name", list(SCHEMES))
def test_steady_state_speed(benchmark, name):
    n, edges, plan, build_s = plan_for(name)
    count, goal = SCHEMES[name][1], SCHEMES[name][2]
    rates = rates_for(len(edges), count)
    out = np.empty((count, n))
    plan.steady_state(rates[:8], out=out[:8])            # compile / load the kernel first
    rounds = 5 if count * plan.flops < 5e8 else 2
    benchmark.pedantic(plan.steady_state, args=(rates,), kwargs={"out": out},
                       rounds=rounds, iterations=1, warmup_rounds=1)
    ours = benchmark.stats.stats.min / count

    few = rates[: min(count, 8 if n >= 1000 else 64)]
    scipy_s = best_time(lambda: spsolve_all(n, edges, few)) / few.shape[0]
    info = {
        "states": n, "edges": len(edges), "fill": plan.fill, "flops": plan.flops,
        "backend": plan.backend, "plan_build_s": round(build_s, 3),
        "tape_bytes": int(sum(a.nbytes for a in plan._tape.values())),
        "ns_per_set": ours * 1e9, "goal_ns_per_set": goal,
        "spsolve_ns_per_set": scipy_s * 1e9, "speedup_vs_spsolve": scipy_s / ours,
        "peak_rss_bytes": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024,
    }
    np.testing.assert_allclose(out[: few.shape[0]], plan.steady_state(few), rtol=0, atol=0)
    if n <= 200:
        batch = rates[: min(count, 2048 if n <= 16 else 64)]
        dense_s = best_time(lambda: dense_all(n, edges, batch)) / batch.shape[0]
        info.update(numpy_dense_ns_per_set=dense_s * 1e9, speedup_vs_numpy_dense=dense_s / ours)
    benchmark.extra_info.update(info)
    print(f"\n{name}: {ours * 1e9:,.0f} ns/set (goal {goal:,}), fill {plan.fill:,}, flops {plan.flops:,}, "
          f"spsolve {scipy_s * 1e9:,.0f} ns/set ({scipy_s / ours:,.0f}x), "
          f"peak RSS {info['peak_rss_bytes'] / 2**20:,.0f} MiB, plan {build_s:.2f} s")


@pytest.mark.parametrize("rows", [512, 4096, 32768])
@pytest.mark.parametrize("threads", [1, 2])
def test_thread_split(benchmark, monkeypatch, rows, threads):
    """Where splitting rows across threads starts to pay (sets MIN_WORK_PER_THREAD)."""
    n, edges, plan, _ = plan_for("Q4")
    rates = rates_for(len(edges), rows, seed=1)
    out = np.empty((rows, n))
    monkeypatch.setattr(numeric, "MIN_WORK_PER_THREAD", 1)     # split whenever threads > 1
    benchmark(plan.steady_state, rates, out=out, threads=threads)
    benchmark.extra_info.update(rows=rows, threads=threads, work=rows * plan.flops,
                                ns_per_set=benchmark.stats.stats.min / rows * 1e9)


# ----------------------------------------------------------------- accuracy


def mp_reference(n, edges, rates, dps=50):
    with mpmath.workdps(dps):
        L = mpmath.zeros(n, n)
        for (i, j), r in zip(edges, rates):
            L[j, i] += mpmath.mpf(float(r))
            L[i, i] -= mpmath.mpf(float(r))
        for j in range(n):
            L[0, j] = mpmath.mpf(1)
        rhs = mpmath.zeros(n, 1)
        rhs[0] = 1
        p = mpmath.lu_solve(L, rhs)
        return [p[i] for i in range(n)]


def digits_kept(values, reference):
    with mpmath.workdps(50):
        worst = max(abs(mpmath.mpf(float(v)) - r) / abs(r) for v, r in zip(values, reference))
    return float(-mpmath.log10(worst)) if worst > 0 else 17.0


@pytest.mark.parametrize("name", ["Q4", "random200"])
def test_accuracy_on_stiff_rates(benchmark, name):
    """Digits kept (−log10 of the worst entrywise relative error against a
    50-digit mpmath solve) for rates log-uniform over [1e-8, 1e8]."""
    n, edges, plan, _ = plan_for(name)
    rates = rates_for(len(edges), 4, seed=3, lo=1e-8, hi=1e8)
    ours = benchmark(plan.steady_state, rates)
    dense = dense_all(n, edges, rates)
    ref = [mp_reference(n, edges, r) for r in rates]
    kept = min(digits_kept(ours[k], ref[k]) for k in range(len(ref)))
    kept_dense = min(digits_kept(dense[k], ref[k]) for k in range(len(ref)))
    benchmark.extra_info.update(digits_elimination=kept, digits_numpy_lu=kept_dense)
    print(f"\n{name} stiff rates: elimination keeps {kept:.1f} digits, numpy LU {kept_dense:.1f}")
    assert kept > 12          # O'Cinneide (1993): entrywise relative accuracy
