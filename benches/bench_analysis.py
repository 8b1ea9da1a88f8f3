"""Analysis at kernel speed: a 1,000-point response curve on Q4, after compile.

Run: ``python -m pytest benches/bench_analysis.py --benchmark-only -q -s``
(or ``python benches/report.py`` for the whole suite and its README).

Q4 (the 4-cube: 16 states, 64 edges, an independent rate symbol per edge,
values 1.0 … 7.3), LLVM back end, compiled once outside the timed call. The
curve is ``s0`` against the rate ``k0_1`` over [1e-3, 1e3] with 1,000 grid
points: grid, limit search on both sides, EC10/50/90 solves, the slope
searches and the Hill fit. Goal: under 50 ms per curve. Beside it, in the
same run, the raw kernel on the 1,000 grid rows, and how many rows the curve
sent through the kernel in all, so the figure reads as evaluations × cost.
"""

from __future__ import annotations

import time

import numpy as np

import baselines as B

GOAL_MS = 50.0


def _q4():
    from treeflux.compiler import compile_scheme
    n, edges = B.hypercube_edges(4)
    return compile_scheme(B.edge_scheme("Q4", n, edges), backend="llvm")


def test_response_curve_q4_1000_points(benchmark):
    from treeflux.runtime.analysis import response_curve

    m = _q4()
    values = {s: 1.0 + 0.1 * k for k, s in enumerate(m.symbols) if s != "k0_1"}
    kw = dict(observable="s0", input="k0_1", lo=1e-3, hi=1e3, points=1000, values=values)
    response_curve(m, **kw)                                   # warm (first-call set-up)
    rows = {"n": 0, "calls": 0}
    # the checked entry every public call uses, with its arguments checked in
    # Python (check) or in C (plain_check)
    originals = {name: getattr(m.kernel, name) for name in ("check", "plain_check")}

    def counting(original):
        def counted(X, *args, **kw):
            result = original(X, *args, **kw)
            if result is not None:                        # None: plain_check declined, check follows
                rows["n"] += X.shape[0]
                rows["calls"] += 1
            return result
        return counted

    for name, original in originals.items():
        setattr(m.kernel, name, counting(original))
    response_curve(m, **kw)
    for name in originals:
        delattr(m.kernel, name)
    assert rows["calls"] > 0
    result = benchmark(lambda: response_curve(m, **kw))
    ms = benchmark.stats.stats.median * 1e3
    X = np.tile(m.as_array(dict(values, k0_1=1.0)), (1000, 1))
    t0 = time.perf_counter()
    for _ in range(20):
        m.kernel(X)
    kernel_ms = (time.perf_counter() - t0) / 20 * 1e3
    assert result["limits"]["upper"]["established"] and result["limits"]["lower"]["established"]
    benchmark.extra_info.update({
        "ms_per_curve": ms, "goal_ms": GOAL_MS, "kernel_rows_per_curve": rows["n"],
        "kernel_calls_per_curve": rows["calls"], "kernel_ms_1000_rows": kernel_ms,
        "goal": {"label": "Q4: response curve of 1,000 points (LLVM, after compile)",
                 "target": f"< {GOAL_MS:g} ms", "measured": f"{ms:.1f} ms", "met": ms < GOAL_MS},
    })
    print(f"\nQ4 response curve, 1,000 points: {ms:.1f} ms (goal < {GOAL_MS:g} ms); "
          f"{rows['n']} kernel rows in {rows['calls']} calls; raw kernel on 1,000 rows {kernel_ms:.3f} ms")
