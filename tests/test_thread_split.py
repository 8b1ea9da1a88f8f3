"""The thread split of kernel calls (runtime.kernel.run_ranges): every range
run once, results in range order, the caller doing the first, pool threads
kept off the caller's core, and a forked child that starts a fresh pool."""

import os
import threading

import numpy as np
import pytest

from treeflux.runtime import kernel as K

CORES = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else 1


def test_every_range_once_in_order():
    seen = []
    lock = threading.Lock()

    def f(a, b):
        with lock:
            seen.append((a, b, threading.get_ident()))
        return (a, b)

    bounds = [0, 3, 7, 7, 20]
    assert K.run_ranges(f, bounds) == [(0, 3), (3, 7), (7, 7), (7, 20)]
    assert sorted((a, b) for a, b, _ in seen) == [(0, 3), (3, 7), (7, 7), (7, 20)]
    first = [t for a, b, t in seen if (a, b) == (0, 3)]
    assert first == [threading.get_ident()]          # the caller ran the first range


def test_one_range_and_none():
    assert K.run_ranges(lambda a, b: b - a, [5, 9]) == [4]
    assert K.run_ranges(lambda a, b: b - a, [5]) == []


def test_errors_of_a_pool_range_reach_the_caller():
    def f(a, b):
        if a:
            raise ValueError("range from %d" % a)
        return 0

    with pytest.raises(ValueError, match="range from 4"):
        K.run_ranges(f, [0, 4, 8])


@pytest.mark.skipif(CORES < 2 or not hasattr(os, "sched_setaffinity"), reason="needs two cores and affinity")
def test_pool_thread_kept_off_the_callers_core():
    where = {}

    def f(a, b):
        where[a] = (K._current_cpu(), os.sched_getaffinity(0))
        return a

    for _ in range(3):
        here = K._current_cpu()
        K.run_ranges(f, [0, 1, 2])
        cpu, allowed = where[1]
        if K._current_cpu() == here:                  # the caller did not move meanwhile
            assert here not in allowed
            assert cpu != here
            assert allowed == K._allowed() - {here}


@pytest.mark.skipif(not hasattr(os, "fork"), reason="needs fork")
def test_forked_child_starts_a_fresh_pool():
    K.run_ranges(lambda a, b: a, [0, 1, 2])           # the parent has a pool and known threads
    assert K._POOL is not None and K._KEPT_OFF
    r, w = os.pipe()
    pid = os.fork()
    if pid == 0:                                      # child: must not wait on the parent's threads
        try:
            fresh = K._POOL is None and not K._KEPT_OFF
            ok = K.run_ranges(lambda a, b: b - a, [0, 2, 5, 9]) == [2, 3, 4]
            os.write(w, b"1" if fresh and ok else b"0")
        finally:
            os._exit(0)
    os.close(w)
    got = os.read(r, 1)
    os.waitpid(pid, 0)
    assert got == b"1"


def test_threaded_kernel_call_same_bits_as_one_thread():
    """A split straight-line call equals the one-thread call bit for bit."""
    from treeflux.compiler import compile_scheme

    from .schemes import hypercube_scheme

    m = compile_scheme(hypercube_scheme(2), backend="python")
    X = np.exp(np.random.default_rng(3).uniform(-5, 5, (3 * K.MIN_ROWS_PER_THREAD, len(m.symbols))))
    one = m.steady_state(X, threads=1)
    two = m.kernel(X, threads=2)
    assert np.array_equal(one, two)
