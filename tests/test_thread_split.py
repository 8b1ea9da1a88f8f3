"""The thread split of kernel calls (runtime.kernel.run_ranges): every range
run once, results in range order, the caller doing the first, pool threads
kept off the caller's core, and a forked child that starts a fresh pool."""

import os
import signal
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
            assert allowed == K._ALLOWED - {here}


@pytest.mark.skipif(not hasattr(os, "fork"), reason="needs fork")
def test_forked_child_starts_a_fresh_pool():
    K.run_ranges(lambda a, b: a, [0, 1, 2])           # the parent has a pool and known threads
    assert K._POOL is not None and K._KEPT_OFF
    assert in_forked_child(lambda: K._POOL is None and not K._KEPT_OFF
                           and K.run_ranges(lambda a, b: b - a, [0, 2, 5, 9]) == [2, 3, 4])


def in_forked_child(check) -> bool:
    """``check()`` in a forked child (a hang fails after 30 s instead of hanging the run)."""
    r, w = os.pipe()
    pid = os.fork()
    if pid == 0:
        signal.alarm(30)
        try:
            os.write(w, b"1" if check() else b"0")
        finally:
            os._exit(0)
    os.close(w)
    got = os.read(r, 1)
    os.waitpid(pid, 0)
    os.close(r)
    return got == b"1"


def test_threaded_kernel_call_same_bits_as_one_thread():
    """A split straight-line call equals the one-thread call bit for bit."""
    from treeflux.compiler import compile_scheme

    from .schemes import hypercube_scheme

    m = compile_scheme(hypercube_scheme(2), backend="python")
    X = np.exp(np.random.default_rng(3).uniform(-5, 5, (3 * K.MIN_ROWS_PER_THREAD, len(m.symbols))))
    one = m.steady_state(X, threads=1)
    two = m.kernel(X, threads=2)
    assert np.array_equal(one, two)


# ------------------------------------------------------------------ the native pool (thread_pool.c)

needs_pool = pytest.mark.skipif(K.native_pool() is None, reason="no working C compiler")


def _q3_llvm():
    from treeflux.compiler import compile_scheme

    from .schemes import hypercube_scheme

    return compile_scheme(hypercube_scheme(3), backend="llvm")


@needs_pool
def test_native_pool_ranges_of_any_shape_same_bits():
    """Every cut of the rows, empty ranges and 64 ranges included, gives the
    one-thread bits; status counts come back per range."""
    m = _q3_llvm()
    k = m.kernel
    rng = np.random.default_rng(5)
    N = 3_001
    X = np.exp(rng.uniform(-7, 7, (N, k.n_inputs)))
    X[1_777, 4] = -1.0                                 # one refused row: flagged in its range only
    ref, ref_status = np.empty((N, k.n_outputs)), np.zeros(N, np.uint8)
    assert k.checked(X, ref, ref_status, 0, N) == 1
    for count in (2, 3, 7, 64):
        for _ in range(5):
            cuts = np.sort(rng.integers(0, N + 1, count - 1))
            bounds = [0, *cuts.tolist(), N]
            out, status = np.full((N, k.n_outputs), np.nan), np.zeros(N, np.uint8)
            got = K.run_native(K.NATIVE_CHECKED, [k.native[1], X.ctypes.data, out.ctypes.data,
                                                  status.ctypes.data], bounds)
            assert np.array_equal(out, ref, equal_nan=True) and np.array_equal(status, ref_status)
            flagged = [i for i in range(count) if bounds[i] <= 1_777 < bounds[i + 1]]
            assert list(got) == [1 if i in flagged else 0 for i in range(count)]


needs_call = pytest.mark.skipif(K.native_pool() is None or K.native_pool().call is None,
                                reason="the native_call extension could not be built")


@needs_call
def test_native_call_matches_the_ctypes_route(monkeypatch):
    """Kernel calls through the extension (native_call.c) and through ctypes
    (its fallback, where no Python headers are found) give the same bits and
    statuses, on one thread and split, for the plain and the checked entry."""
    m = _q3_llvm()
    k = m.kernel
    X = np.exp(np.random.default_rng(9).uniform(-7, 7, (2_500, k.n_inputs)))
    X[2_100, 3] = -1.0                                 # flagged by the checked entry
    results = {}
    for route in ("extension", "ctypes"):
        if route == "ctypes":
            monkeypatch.setattr(K.native_pool(), "call", None)
            monkeypatch.setattr(k, "_pool_call", True)
        for threads in (1, 2):
            out, status = np.full((2_500, k.n_outputs), np.nan), np.zeros(2_500, np.uint8)
            flagged = k.check(X, out, status, threads)
            results[route, threads] = (out, status, flagged, k(X, threads=threads))
    ref = results["extension", 1]
    assert ref[2] == 1 and ref[1][2_100] != 0 and np.isfinite(ref[0][:2_000]).all()
    for key, (out, status, flagged, plain) in results.items():
        assert np.array_equal(out, ref[0], equal_nan=True) and np.array_equal(status, ref[1]), key
        assert flagged == ref[2] and np.array_equal(plain, ref[3], equal_nan=True), key


@needs_call
def test_native_call_refuses_what_it_cannot_pass():
    call = K.native_pool().call
    m = _q3_llvm()
    address = m.kernel.native[0]
    X, out = np.ones((32, m.kernel.n_inputs)), np.empty((32, m.kernel.n_outputs))
    with pytest.raises(TypeError, match="wrong number of arguments"):
        call(0, 32, 1)
    with pytest.raises(ValueError, match="1 to 64 ranges"):
        call(0, 32, 0, address, X, out)
    with pytest.raises(ValueError, match="1 to 64 ranges"):
        call(0, 32, 65, address, X, out)
    with pytest.raises(ValueError, match="must not decrease"):
        call(0, 32, (0, 20, 10, 32), address, X, out)
    with pytest.raises(TypeError):
        call(0, 32, 1, address, "not an array", out)
    with pytest.raises((BufferError, ValueError)):
        call(0, 32, 1, address, np.ones((32, 2 * m.kernel.n_inputs))[:, ::2], out)   # not contiguous
    assert call(0, 32, (0, 5, 32), address, X, out) == (0, 0)
    assert np.array_equal(out, m.kernel(X, threads=1))


@needs_pool
def test_native_pool_back_to_back_and_from_several_threads():
    """Many calls in a row (workers awake, stale wake-ups of earlier calls)
    and calls from four Python threads at once (one gets the pool, the others
    run alone): every result is the one-thread result."""
    from concurrent.futures import ThreadPoolExecutor

    m = _q3_llvm()
    rng = np.random.default_rng(6)
    Xs = [np.exp(rng.uniform(-5, 5, (n, len(m.symbols)))) for n in (600, 1_500, 4_100)]
    refs = [m.steady_state(X, threads=1) for X in Xs]
    for i in range(300):
        j = i % 3
        assert np.array_equal(m.steady_state(Xs[j], threads=2), refs[j])

    def many(j):
        return all(np.array_equal(m.steady_state(Xs[j], threads=2), refs[j]) for _ in range(50))

    with ThreadPoolExecutor(4) as ex:
        assert all(ex.map(many, [0, 1, 2, 0]))


@needs_pool
def test_small_calls_split_on_the_native_pool(monkeypatch):
    monkeypatch.setattr(K, "_CORES", 2)
    k = _q3_llvm().kernel
    assert k.min_rows() == K.NATIVE_MIN_ROWS_PER_THREAD
    k.seconds_per_row.update({1: 25e-9, 2: 14e-9})
    assert k.threads_for(1_024) == 2                   # 26 us of work: worth the second core
    assert k.threads_for(300) == 1                     # too few rows for two threads


@needs_pool
def test_looped_path_bad_row_in_a_workers_range_is_named():
    """The tape kernel on the native pool: a bad rate in the second range is
    reported with its own row and edge (each range has its own error slot)."""
    from treeflux.runtime.numeric import EliminationPlan

    from .test_numeric import log_uniform, random_scheme

    edges = random_scheme(30, 90, 4)
    plan = EliminationPlan(30, edges)
    rates = log_uniform(np.random.default_rng(4), (4_000, 90), 1e-3, 1e3)
    assert plan.threads_for(4_000, 2) == 2
    ref = plan.steady_state(rates, threads=1)
    assert np.array_equal(plan.steady_state(rates, threads=2), ref)
    rates[3_500, 17] = 0.0
    with pytest.raises(Exception, match=r"row 3500: rate of edge 17"):
        plan.steady_state(rates, threads=2)


@needs_pool
@pytest.mark.skipif(not hasattr(os, "fork"), reason="needs fork")
def test_forked_child_uses_the_native_pool():
    m = _q3_llvm()
    X = np.exp(np.random.default_rng(8).uniform(-5, 5, (2_048, len(m.symbols))))
    ref = m.steady_state(X, threads=1)
    assert np.array_equal(m.steady_state(X, threads=2), ref)      # the parent's workers exist
    assert in_forked_child(lambda: all(np.array_equal(m.steady_state(X, threads=2), ref) for _ in range(20)))


@needs_pool
@pytest.mark.skipif(not hasattr(os, "fork"), reason="needs fork")
def test_fork_while_another_thread_is_splitting_calls():
    """A child forked while the parent's workers were inside a call must not
    wait for them (they do not exist in the child): 15 forks during a stream of
    two-thread calls, each child splitting calls of its own. Found by a stress
    run: 1 child in 30 hung before the child reset the running count."""
    m = _q3_llvm()
    X = np.exp(np.random.default_rng(9).uniform(-5, 5, (5_000, len(m.symbols))))
    ref = m.steady_state(X, threads=1)
    stop = threading.Event()

    def hammer():
        while not stop.is_set():
            m.steady_state(X, threads=2)

    t = threading.Thread(target=hammer)
    t.start()
    try:
        good = sum(in_forked_child(lambda: all(np.array_equal(m.steady_state(X, threads=2), ref)
                                               for _ in range(3))) for _ in range(15))
    finally:
        stop.set()
        t.join()
    assert good == 15


@pytest.mark.skipif(CORES < 2 or not hasattr(os, "sched_setaffinity"), reason="needs two cores and affinity")
def test_cores_follow_the_affinity_mask():
    """A process allowed one core (``taskset``, a container) splits nothing by
    default, whatever ``os.cpu_count()`` says."""
    import subprocess
    import sys

    code = ("import treeflux.runtime.kernel as K, treeflux.runtime.numeric as N;"
            "print(K._CORES, N._CORES, K.usable_cores())")
    one = next(iter(os.sched_getaffinity(0)))
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                         preexec_fn=lambda: os.sched_setaffinity(0, {one})).stdout.split()
    assert out == ["1", "1", "1"]
    assert K.usable_cores() == CORES
