"""Parameter sweeps on a local Dask cluster against one process, one run.

Run: ``python -m pytest benches/bench_sweeps.py --benchmark-only -q -s``
(or ``python benches/report.py`` for the whole suite and its README).

Scheme: ``examples/promoter_two_activators.toml`` (8 states, 8 symbols),
response features of ``polymerase_bound`` to ``c`` over [1e-2, 1e4] (41 grid
points per curve, then EC solves and slope searches: ~320 model evaluations
per sample).

- Scaling: a sweep sized to take about 12 s in this process (numpy back end,
  ``sample(...)`` with no workers), then the same sweep with ``workers=2``
  (a LocalCluster of two single-threaded processes, started and closed inside
  the timed call). Goal on this 2-core machine: ≥ 1.7× (ratio of wall times).
  The two tables must be equal bit for bit.
- One million samples of the same response features with ``workers=2`` on
  the LLVM back end. Goal: < 60 s.

Figures land in ``extra_info`` (ratios measured in the same run); the
machine may be shared, so they carry the load average beside them.
"""

from __future__ import annotations

import os
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
MODEL = ROOT / "examples" / "promoter_two_activators.toml"
RESPONSE = {"observable": "polymerase_bound", "input": "c", "lo": 1e-2, "hi": 1e4, "points": 41}
TARGET_SECONDS = 12.0


def _compile(backend):
    from treeflux.compiler import compile_scheme, load
    return compile_scheme(load(MODEL), backend=backend)


def _timed(fn):
    t0 = time.perf_counter()
    out = fn()
    return out, time.perf_counter() - t0


def test_two_workers_against_one_process(benchmark):
    from treeflux.runtime.sampling import sample

    m = _compile("python")
    sample(m, 500, seed=1, response=RESPONSE)                 # first-call costs (imports) out of the probe
    _, probe = _timed(lambda: sample(m, 5000, seed=1, response=RESPONSE))
    n = int(5000 * TARGET_SECONDS / probe)
    load_before = os.getloadavg()[0]
    local, t_one = _timed(lambda: sample(m, n, seed=7, response=RESPONSE))
    holder = {}

    def two():
        holder["r"] = sample(m, n, seed=7, response=RESPONSE, workers=2)

    benchmark.pedantic(two, rounds=1, iterations=1)
    t_two = benchmark.stats.stats.median
    assert np.array_equal(local["data"], holder["r"]["data"], equal_nan=True)
    benchmark.extra_info.update({
        "samples": n, "one_process_s": t_one, "two_workers_s": t_two,
        "speedup_two_workers": t_one / t_two, "goal_speedup": 1.7,
        "goal": {"label": f"sweep of {n:,} response samples (~{TARGET_SECONDS:g} s): two workers / one process",
                 "target": "≥ 1.7×", "measured": f"{t_one / t_two:.2f}× ({t_one:.1f} s / {t_two:.1f} s, "
                 "cluster start included)", "met": t_one / t_two >= 1.7},
        "load_average_before": load_before, "load_average_after": os.getloadavg()[0],
    })
    print(f"\nsweep of {n} response samples: one process {t_one:.2f} s, two workers {t_two:.2f} s, "
          f"ratio {t_one / t_two:.2f} (goal >= 1.7; load {load_before:.1f} -> {os.getloadavg()[0]:.1f})")


def test_one_million_response_samples(benchmark):
    from treeflux.runtime.sampling import sample

    m = _compile("llvm")
    load_before = os.getloadavg()[0]
    holder = {}

    def run():
        holder["r"] = sample(m, 1_000_000, seed=3, response=RESPONSE, workers=2)

    benchmark.pedantic(run, rounds=1, iterations=1)
    t = benchmark.stats.stats.median
    r = holder["r"]
    assert r["data"].shape == (1_000_000, len(r["columns"]))
    # spot check: the first rows equal a run in this process
    first = sample(m, r["blocks"], seed=3, response=RESPONSE)
    assert np.array_equal(first["data"], r["data"][:r["blocks"]], equal_nan=True)
    benchmark.extra_info.update({
        "seconds": t, "goal_seconds": 60, "samples_per_second": 1e6 / t,
        "goal": {"label": "1,000,000 response samples, two workers (LLVM)", "target": "< 60 s",
                 "measured": f"{t:.1f} s", "met": t < 60},
        "load_average_before": load_before, "load_average_after": os.getloadavg()[0],
    })
    print(f"\n1,000,000 response samples (llvm, two workers): {t:.1f} s (goal < 60 s; "
          f"load {load_before:.1f} -> {os.getloadavg()[0]:.1f})")
