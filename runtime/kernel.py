"""Batch execution of a compiled kernel over rows of parameter sets.

Every back end produces a *row-range function* ``run(X, out, start, stop)``
that evaluates rows ``start:stop`` of the C-contiguous float64 array ``X``
(N, n_inputs) into ``out`` (N, n_outputs) and returns 0, or a non-zero status
(row index + 1 of the first row it refused). Native row-range functions
release the GIL, so :class:`Kernel` splits large N across threads.

Kernels built for the runtime also carry a *checked* row-range function
``checked(X, out, status, start, stop) -> count`` (the fused checks of
:class:`RowChecks`): while it holds a block of rows in registers anyway it
tests every symbol against its floor, the row sums of the probability blocks
and the finiteness of chosen outputs, writes one status byte per row
(:data:`BAD_SYMBOL`, :data:`NOT_PROBABILITY`, :data:`NOT_FINITE`, or 0) into
the uint8 array ``status`` and returns how many rows it flagged. Every row is
evaluated and written, flagged or not; the caller looks at ``status`` only
when the count is non-zero.
"""

from __future__ import annotations

import ctypes
import hashlib
import os
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np

from .errors import EvaluationError

# Below this many rows per thread, one thread is faster (thread start-up and
# cache effects dominate); measured in benches/bench_backends.py.
MIN_ROWS_PER_THREAD = 2048

#: Status bits of the checked row-range functions (one uint8 per row).
BAD_SYMBOL = 1        # a symbol is not finite or below its floor: refuse (the runtime names it)
NOT_PROBABILITY = 2   # a probability block is not finite or its sum misses 1 by more than tol
NOT_FINITE = 4        # an output of the ``finite`` range is not finite


@dataclass(frozen=True)
class RowChecks:
    """What a checked kernel tests per row (see the module docstring).

    ``floors``: per input ``(low, inclusive)``: the value must be finite and
    ``> low`` (``>= low`` when inclusive); ``low = -inf`` with inclusive
    asks for finiteness only. ``blocks``: ``(start, stop)`` output ranges
    that are probability vectors: their sum, added left to right, must be
    finite and within ``tol`` of 1. ``finite``: ``(start, stop)`` outputs that
    must be finite (``(0, 0)``: none)."""

    floors: tuple
    blocks: tuple
    finite: tuple = (0, 0)
    tol: float = 2.0 ** -40

_POOL: ThreadPoolExecutor | None = None
# Threads per call when the caller gives none (None: every core). Worker
# processes of a sweep set 1: the cluster already runs one task per core.
_DEFAULT_THREADS: int | None = None
_REBUILT: dict = {}  # kernels rebuilt in this process from their recipes


def set_default_threads(threads: int | None) -> None:
    """Threads a kernel call uses when not told (None: one per core)."""
    global _DEFAULT_THREADS
    _DEFAULT_THREADS = None if threads is None else max(1, int(threads))


def rebuild(func, args) -> "Kernel":
    """``func(*args)`` once per process: what an unpickled Kernel becomes.
    ``args`` is data (generated source or IR text, sizes, flags)."""
    key = (func.__module__, func.__qualname__, hashlib.sha256(repr(args).encode()).hexdigest())
    kernel = _REBUILT.get(key)
    if kernel is None:
        while len(_REBUILT) >= 32:
            _REBUILT.pop(next(iter(_REBUILT)))
        kernel = _REBUILT[key] = func(*args)
    return kernel


def _pool() -> ThreadPoolExecutor:
    global _POOL
    if _POOL is None:
        _POOL = ThreadPoolExecutor(max_workers=usable_cores(),
                                   thread_name_prefix="treeflux", initializer=_register)
    return _POOL


def run_ranges(func, bounds) -> list:
    """``[func(a, b) for consecutive a, b in bounds]``, the ranges side by side:
    every range but the first goes to the pool and the calling thread runs the
    first itself (``func`` must release the GIL to overlap).

    Where the thread goes matters as much as that it exists. When the caller
    handed out every range and slept, or even when it stayed busy, Linux
    often woke the pool thread on the caller's own core (2 vCPUs under KVM
    here; a wakee is placed beside its waker) and both ran there for the
    whole call: random 200 states, 2,048 sets, 2 threads took 2.4 or 5.3 µs
    per set by chance, seen with ``sched_getcpu``. So the pool threads are
    kept off the caller's core (:func:`_keep_off`) before they are woken:
    their affinity becomes every core the process may use but that one, a
    system call per pool thread only when the caller's core changed. Where
    affinity cannot be set, the scheduler decides as before."""
    bounds = [int(b) for b in bounds]
    if len(bounds) <= 2:
        return [func(bounds[0], bounds[-1])] if len(bounds) == 2 else []
    here = _current_cpu()
    for tid in list(_KEPT_OFF):
        _keep_off(tid, here)
    futures = [_pool().submit(_away_from, here, func, a, b) for a, b in zip(bounds[1:-1], bounds[2:])]
    first = func(bounds[0], bounds[1])
    return [first] + [f.result() for f in futures]


# Threads of the native pool (thread_pool.c) spin this long after a call
# before they sleep: a call that follows within it is joined in about a
# microsecond instead of the 80-100 us a sleeping thread took to wake here.
POOL_SPIN_SECONDS = 1e-3
_NATIVE = None          # tf_pool_run through ctypes, False when it cannot be built
_NATIVE_LOCK = threading.Lock()


def native_pool():
    """``tf_pool_run`` of the shared native pool, or None where no C compiler works."""
    global _NATIVE
    if _NATIVE is None:
        with _NATIVE_LOCK:
            if _NATIVE is None:
                _NATIVE = _load_native_pool() or False
    return _NATIVE or None


def _load_native_pool():
    from pathlib import Path

    from .cache import CompileError, shared_library
    try:
        source = Path(__file__).with_name("thread_pool.c").read_text()
        lib = ctypes.CDLL(str(shared_library(source, flags=("-O2", "-pthread"), libs=("-lpthread",),
                                             name="thread_pool")))
    except (CompileError, OSError):
        return None
    lib.tf_pool_set_spin(ctypes.c_int64(int(POOL_SPIN_SECONDS * 1e9)))
    fn = lib.tf_pool_run
    fn.restype = None
    fn.argtypes = [ctypes.c_int64, ctypes.c_void_p, ctypes.c_void_p, ctypes.c_int64, ctypes.c_void_p]
    fn.library = lib                     # keeps the library loaded as long as the function
    module = _load_native_call(ctypes.cast(fn, ctypes.c_void_p).value)
    fn.call = module.call if module else None            # see native_call.c
    fn.checked = module.checked if module else None
    return fn


def _load_native_call(pool_address: int):
    """The extension module built from native_call.c (one native kernel call
    without ctypes: 0.2 instead of 2 us), or None where it cannot be built
    (no Python headers): then calls go through ctypes."""
    import sys
    import sysconfig
    from pathlib import Path

    from .cache import CompileError, load_extension, shared_library
    name = "_treeflux_native_call"
    try:
        source = Path(__file__).with_name("native_call.c").read_text()
        include = sysconfig.get_paths()["include"]
        # the interpreter's version in the flags, so in the cache key: an
        # extension module is built for one Python
        path = shared_library(source, flags=("-O2", f"-I{include}", f"-DTREEFLUX_PY={sys.hexversion}"),
                              libs=(), name=name)
        module = load_extension(name, path)
    except (CompileError, ImportError, OSError, KeyError):
        return None
    module.set_pool(pool_address, np.ndarray)
    return module


#: Kinds of native row-range functions the pool calls (see thread_pool.c).
NATIVE_ROWS, NATIVE_CHECKED, NATIVE_TAPE = 0, 1, 2


def run_native(kind: int, args, bounds) -> tuple | None:
    """The ranges of one native kernel call on the native pool: each range's
    status, or None when there is no native pool (then use :func:`run_ranges`).
    ``args``: the kernel's address, then its arguments (see thread_pool.c),
    each an int or a C-contiguous array (passed by its data address).
    ``bounds``: the row bounds of the ranges, or ``(n, ranges)`` for rows
    0..n cut into that many near-equal ranges. Releases the GIL for the call."""
    fn = native_pool()
    if fn is None:
        return None
    if fn.call is not None:
        return fn.call(kind, *bounds, *args) if type(bounds) is tuple else fn.call(kind, bounds[-1], tuple(bounds), *args)
    if type(bounds) is tuple:
        n, count = bounds
        bounds = [n * i // count for i in range(count + 1)]
    args = [a if isinstance(a, int) else data_address(a) for a in args]
    count = len(bounds) - 1
    words = (ctypes.c_int64 * (len(args) + 2 * count + 1))(*args, *bounds)
    at = ctypes.addressof(words)
    fn(kind, at, at + 8 * len(args), count, at + 8 * (len(args) + count + 1))
    return tuple(words[len(args) + count + 1:])


_SCHED_GETCPU = None
_KEPT_OFF: dict = {}    # native id of each pool thread → the core it is kept off (None: none yet)


def _register() -> None:
    """Pool thread initializer: make the thread known to :func:`run_ranges`."""
    _KEPT_OFF.setdefault(threading.get_native_id(), None)


def _current_cpu() -> int:
    """The core the calling thread runs on (-1 where the C library cannot tell)."""
    global _SCHED_GETCPU
    if _SCHED_GETCPU is None:
        try:
            _SCHED_GETCPU = ctypes.CDLL(None).sched_getcpu
            _SCHED_GETCPU.restype = ctypes.c_int
        except (OSError, AttributeError):
            _SCHED_GETCPU = False
    return _SCHED_GETCPU() if _SCHED_GETCPU else -1


def _keep_off(tid: int, cpu: int) -> None:
    """Let pool thread ``tid`` run on every allowed core but ``cpu``."""
    if cpu < 0 or _KEPT_OFF.get(tid) == cpu:
        return
    _KEPT_OFF[tid] = cpu
    others = _ALLOWED - {cpu}
    if others:
        try:
            os.sched_setaffinity(tid, others)
        except (AttributeError, OSError):
            pass


def _forget_pool() -> None:
    """In a forked child: the parent's pool threads do not exist here (a
    submit would wait forever) and their thread ids may name other processes'
    threads; start afresh."""
    global _POOL, _ALLOWED
    _POOL, _ALLOWED = None, _affinity()
    _KEPT_OFF.clear()


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_forget_pool)


def _away_from(cpu: int, func, a: int, b: int):
    """``func(a, b)`` in a pool thread, kept off core ``cpu`` first (a thread
    the pool started for this very call was not yet known to the caller)."""
    _keep_off(threading.get_native_id(), cpu)
    return func(a, b)


# Default thread count (threads=None). A second thread pays only when a
# row's arithmetic outweighs its memory traffic, and that depends on the
# machine as much as on the model: Q3 with LLVM at N = 200,000 ran 8.5 ns per
# set on one thread and slower on two on one 2-core AVX-512 machine (memory
# bound, TECH-NOTES), while on another 2-core Xeon it ran 32 ns on one and
# 16 ns on two (compute bound); Q4 and Q5 gained nothing there with the other
# core busy. No fixed rule is right on both, so each kernel measures itself:
# calls of at least 2 × MIN_ROWS_PER_THREAD rows are timed, the first runs on
# one thread, the next one large enough (≥ MIN_SPLIT_SECONDS on one thread)
# on every core it may use, and from then on the split is used only if its
# best time per row beat one thread's best by SPLIT_GAIN. A split that lost is
# tried again every RETRY_SPLIT-th call: its first try also pays for starting
# the pool's threads (Q3, 1,024 rows: 1.6 ms instead of 7 us), or finds them
# asleep, and a model that never retried stayed on one thread for good (15.5
# instead of 9.6 ns per set). So at most one call in RETRY_SPLIT is slower than
# the better choice. Threads never change the bits (rows are independent).
MIN_SPLIT_SECONDS = 200e-6
SPLIT_GAIN = 0.9
RETRY_SPLIT = 32
# Kernels on the native pool split far smaller calls: the caller claims any
# range no awake worker took, so a split costs a few microseconds at most.
NATIVE_MIN_ROWS_PER_THREAD = 256
NATIVE_MIN_SPLIT_SECONDS = 10e-6


def _affinity() -> set:
    """The cores this process may run on (its affinity mask; empty where the
    system has none). Read at import, before any pool thread had its own
    mask narrowed (:func:`_keep_off`)."""
    try:
        return set(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return set()


_ALLOWED = _affinity()
# a container or ``taskset`` may allow fewer cores than the machine has
_CORES = len(_ALLOWED) or max(1, os.cpu_count() or 1)


def usable_cores() -> int:
    """Cores this process may run on (default thread counts follow it)."""
    return _CORES


def data_address(a: np.ndarray) -> int:
    """The data address of a C-contiguous array, for a native call
    (``ctypes.addressof`` of a writable buffer costs a third of ``a.ctypes.data``)."""
    if a.flags.writeable and a.nbytes:
        return ctypes.addressof(ctypes.c_char.from_buffer(a))
    return a.ctypes.data


def check_threads(threads) -> None:
    """``threads`` is None (all cores) or a positive integer; else EvaluationError."""
    if threads is None:
        return
    if isinstance(threads, (bool, np.bool_)) or not isinstance(threads, (int, np.integer)):
        raise EvaluationError(f"threads must be a positive integer, got {type(threads).__name__}")
    if threads < 1:
        raise EvaluationError(f"threads must be a positive integer, got {int(threads)}")


class Kernel:
    """A compiled function of rows with a thread-splitting call.

    Parameters
    ----------
    run : callable
        ``run(X, out, start, stop) -> int`` (see the module docstring).
    n_inputs, n_outputs : int
    backend : str
        Name of the back end that built it (for reports).
    recipe : object, optional
        What rebuilds the kernel in another process (pickling for Dask):
        a picklable ``(callable, args)`` pair.
    keepalive : object, optional
        Anything that must live as long as ``run`` (a JIT engine, a library).
    native : tuple, optional
        ``(run_address, checked_address)`` of native row-range functions
        (checked 0 when absent): calls split over threads then go to the
        native pool (:func:`run_native`), which makes small splits pay.
    """

    def __init__(self, run, n_inputs: int, n_outputs: int, *, backend: str,
                 recipe=None, keepalive=None, parallel: bool = True, checked=None, native=None):
        self.run = run
        self.checked = checked
        self.native = native
        self.n_inputs = n_inputs
        self.n_outputs = n_outputs
        self.backend = backend
        self.recipe = recipe
        self.parallel = parallel
        self._keepalive = keepalive
        self.native_threads = False  # the compiled code runs its own threads (OpenMP)
        self.seconds_per_row: dict = {}  # threads → best time per row seen (the thread rule)
        self._pool_call = None  # native_call's call, True (pool through ctypes), False (no pool): _pooled
        self._min_rows = MIN_ROWS_PER_THREAD
        self._lost_splits = 0   # calls the thread rule kept on one thread (see RETRY_SPLIT)
        self._pool_checked = None  # native_call's checked for the checked entry: plain_check

    def _pooled(self) -> bool:
        """Whether calls go to the native pool (decided once per kernel)."""
        if self._pool_call is None:
            pool = native_pool() if self.native else None
            self._pool_call = False if pool is None else (pool.call or True)
            self._pool_checked = pool.checked if pool is not None and self.native[1] else None
            self._min_rows = NATIVE_MIN_ROWS_PER_THREAD if pool is not None else MIN_ROWS_PER_THREAD
        return self._pool_call is not False

    def min_rows(self) -> int:
        """Rows per thread below which a call is not split."""
        if self._pool_call is None:
            self._pooled()
        return self._min_rows

    def threads_for(self, n: int, threads: int | None = None) -> int:
        """Threads a call on ``n`` rows uses: ``threads`` if given (at most
        one per :meth:`min_rows` rows), else the measured rule above."""
        rows = self.min_rows()
        if n < 2 * rows or not (self.parallel or self.native_threads):
            return 1
        most = min(_CORES, n // rows)
        if threads is None and _DEFAULT_THREADS is None:
            one = self.seconds_per_row.get(1)
            least = NATIVE_MIN_SPLIT_SECONDS if self._pooled() else MIN_SPLIT_SECONDS
            if one is None or n * one < least:
                return 1
            split = self.seconds_per_row.get(most)
            if split is None or split < SPLIT_GAIN * one:
                return most
            self._lost_splits += 1
            return most if self._lost_splits % RETRY_SPLIT == 0 else 1
        return max(1, min(threads or _DEFAULT_THREADS, most))

    def plain_check(self, X, out, threads=None):
        """:meth:`check` over every row of ``X`` in one native call whose
        argument checks are made in C (native_call.c ``checked``): 0 when no
        row was flagged, else the status bytes of every row (a read-only uint8
        array); None when this kernel has no such call or when ``X`` is not a
        C-contiguous float64 ndarray (N, n_inputs) and ``out`` a writable one
        (N, n_outputs) apart from it: the caller then takes its validating
        path, which names what is wrong. ``threads`` as in :meth:`threads_for`."""
        if self._pool_call is None:
            self._pooled()
        checked = self._pool_checked
        if checked is None or type(X) is not np.ndarray or X.ndim != 2:
            return None
        n = X.shape[0]
        threads = self.threads_for(n, threads)
        status = self._timed(checked, n, threads, self.native[1], threads, self.n_inputs,
                             self.n_outputs, X, out, split=False)
        return status if status is None or status == 0 else np.frombuffer(status, dtype=np.uint8)

    def _timed(self, func, n: int, threads: int, *args, split: bool = True):
        """``self._split(func, n, threads, *args)`` (``func(*args)`` when not
        ``split``), timed into :attr:`seconds_per_row` for large calls."""
        if n < 2 * self.min_rows():
            return self._split(func, n, threads, *args) if split else func(*args)
        t0 = time.perf_counter()
        result = self._split(func, n, threads, *args) if split else func(*args)
        if result is None:                 # a call that declined its arguments (plain_check)
            return None
        per_row = (time.perf_counter() - t0) / n
        best = self.seconds_per_row.get(threads)
        if best is None or per_row < best:
            self.seconds_per_row[threads] = per_row
        return result

    def _split(self, func, n: int, threads: int, *args):
        """``func(*args, start, stop)`` over ``threads`` contiguous row ranges:
        each range's status. A native kernel goes to the native pool, through
        native_call.c when it was built (also for one range: it costs less
        than ctypes), through ctypes when it splits."""
        if self._pool_call is None:
            self._pooled()
        call = self._pool_call
        if call is not False and (func is self.run or func is self.checked):
            address, kind = (self.native[0], NATIVE_ROWS) if func is self.run else (self.native[1], NATIVE_CHECKED)
            if address and call is not True:
                return call(kind, n, threads, address, *args)
            if address and threads > 1:
                return run_native(kind, (address, *args), (n, threads))
        if threads == 1:
            return [func(*args, 0, n)]
        return run_ranges(lambda a, b: func(*args, a, b), [n * i // threads for i in range(threads + 1)])

    def __call__(self, X: np.ndarray, out: np.ndarray | None = None, *, threads: int | None = None):
        X = np.ascontiguousarray(X, dtype=np.float64)
        if X.ndim != 2 or X.shape[1] != self.n_inputs:
            raise EvaluationError(f"expected an (N, {self.n_inputs}) array of inputs, got shape {X.shape}")
        n = X.shape[0]
        if out is None:
            out = np.empty((n, self.n_outputs))
        elif out.shape != (n, self.n_outputs) or out.dtype != np.float64 or not out.flags.c_contiguous:
            raise EvaluationError(f"out must be a C-contiguous float64 array of shape {(n, self.n_outputs)}")
        check_threads(threads)
        status = self._timed(self.run, n, self.threads_for(n, threads), X, out)
        bad = [s for s in status if s]
        if bad:
            raise EvaluationError(f"row {min(bad) - 1}: the kernel refused this parameter set "
                                  "(a rate is non-positive or not finite)")
        return out

    def check(self, X: np.ndarray, out: np.ndarray, status: np.ndarray, threads: int) -> int:
        """The checked row-range function over all rows of ``X`` on ``threads``
        threads: outputs into ``out``, one status byte per row into ``status``;
        returns the number of flagged rows. No argument checks: the caller
        passes a C-contiguous float64 ``X`` (N, n_inputs), ``out`` (N,
        n_outputs) and uint8 ``status`` (N,), none overlapping."""
        return sum(self._timed(self.checked, X.shape[0], threads, X, out, status))

    def __reduce__(self):
        """Pickle as the recipe (data), rebuilt once per process by :func:`rebuild`."""
        if self.recipe is None:
            raise TypeError(f"this {self.backend} kernel has no recipe and cannot be pickled")
        return (rebuild, tuple(self.recipe))
