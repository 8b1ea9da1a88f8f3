"""Benchmarks of planning (treeflux.compiler.pipeline.plan): resource guards before work.

Goals (issue 10, item 2): a 50,000-state chain is planned in under 5 s; a
2,000-state random graph of out-degree 8 is planned — here: refused with its
estimate — in seconds, without exhausting memory. Reported with the ratio to
building the scheme itself (Scheme.add_edge for every edge, which parses every
rate) in the same run, and the peak resident memory of the process.

Run: python -m pytest benches/bench_planning.py -q
"""

from __future__ import annotations

import random
import resource
import time

import pytest

from treeflux.compiler.errors import TooLargeError
from treeflux.compiler.model import Scheme
from treeflux.compiler.pipeline import plan


def chain_scheme(n):
    s = Scheme(name=f"chain {n}")
    s.add_parameter("kf", value=2.0)
    s.add_parameter("kb", value=1.0)
    for i in range(n - 1):
        s.add_edge(f"s{i}", f"s{i + 1}", "kf")
        s.add_edge(f"s{i + 1}", f"s{i}", "kb")
    return s


def random_scheme(n, out_degree, seed):
    """n states, each with `out_degree` random targets (one symbol per edge)."""
    rng = random.Random(seed)
    s = Scheme(name=f"random {n}")
    e = 0
    for i in range(n):
        targets = set()
        while len(targets) < out_degree:
            j = rng.randrange(n)
            if j != i:
                targets.add(j)
        for j in sorted(targets):
            s.add_edge(f"s{i}", f"s{j}", f"k{e}")
            e += 1
    return s


def _timed(fn):
    t0 = time.perf_counter()
    out = fn()
    return out, time.perf_counter() - t0


def _peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def test_plan_chain_50000(benchmark):
    scheme, build = _timed(lambda: chain_scheme(50_000))
    p = benchmark.pedantic(plan, args=(scheme,), rounds=2, iterations=1)
    t = benchmark.stats.stats.median
    assert p.method == "numeric" and p._numeric is None          # no tape built
    benchmark.extra_info.update({
        "scheme": "chain 50,000 states", "plan_s": t, "build_scheme_s": build,
        "ratio_plan_vs_build": t / build, "goal_s": 5.0, "met": t < 5.0,
        "elimination_flops": p.reasons["elimination_flops"], "peak_rss_mb": _peak_mb()})


def test_plan_random_2000_out_degree_8(benchmark):
    scheme, build = _timed(lambda: random_scheme(2_000, 8, seed=3))

    def refused():
        try:
            plan(scheme)
        except TooLargeError as exc:
            return str(exc)
        return None

    message = benchmark.pedantic(refused, rounds=2, iterations=1)
    t = benchmark.stats.stats.median
    assert message is not None and "more than" in message
    benchmark.extra_info.update({
        "scheme": "random 2,000 states, out-degree 8", "plan_s": t, "build_scheme_s": build,
        "ratio_plan_vs_build": t / build, "refused": message, "peak_rss_mb": _peak_mb()})
