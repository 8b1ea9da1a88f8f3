"""Batch execution of a compiled kernel over rows of parameter sets.

Every back end produces a *row-range function* ``run(X, out, start, stop)``
that evaluates rows ``start:stop`` of the C-contiguous float64 array ``X``
(N, n_inputs) into ``out`` (N, n_outputs) and returns 0, or a non-zero status
(row index + 1 of the first row it refused). Native row-range functions
release the GIL, so :class:`Kernel` splits large N across threads.
"""

from __future__ import annotations

import hashlib
import os
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from .errors import EvaluationError

# Below this many rows per thread, one thread is faster (thread start-up and
# cache effects dominate); measured in benches/bench_backends.py.
MIN_ROWS_PER_THREAD = 2048

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
        _POOL = ThreadPoolExecutor(max_workers=max(1, os.cpu_count() or 1),
                                   thread_name_prefix="treeflux")
    return _POOL


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
    """

    def __init__(self, run, n_inputs: int, n_outputs: int, *, backend: str,
                 recipe=None, keepalive=None, parallel: bool = True):
        self.run = run
        self.n_inputs = n_inputs
        self.n_outputs = n_outputs
        self.backend = backend
        self.recipe = recipe
        self.parallel = parallel
        self._keepalive = keepalive

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
        threads = threads or _DEFAULT_THREADS or (os.cpu_count() or 1)
        threads = max(1, min(threads, n // MIN_ROWS_PER_THREAD)) if self.parallel else 1
        if threads == 1:
            status = [self.run(X, out, 0, n)]
        else:
            bounds = np.linspace(0, n, threads + 1).astype(int)
            status = list(_pool().map(lambda ab: self.run(X, out, int(ab[0]), int(ab[1])),
                                      zip(bounds[:-1], bounds[1:])))
        bad = [s for s in status if s]
        if bad:
            raise EvaluationError(f"row {min(bad) - 1}: the kernel refused this parameter set "
                                  "(a rate is non-positive or not finite)")
        return out

    def __reduce__(self):
        """Pickle as the recipe (data), rebuilt once per process by :func:`rebuild`."""
        if self.recipe is None:
            raise TypeError(f"this {self.backend} kernel has no recipe and cannot be pickled")
        return (rebuild, tuple(self.recipe))
