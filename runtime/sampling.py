"""Sampling parameter space: what can a scheme do?

Each free parameter θ is drawn log-uniformly, ln θ ~ U(ln lo, ln hi), from
its bounds in the model; a parameter with only a value spans
``DEFAULT_DECADES`` decades either side of it; parameters given in
``values`` are held fixed. Each sample is then evaluated: its steady state
and observables, or — with a response specification — the summary of its
response curve (ec50, effective Hill coefficient, steepest log-slope; see
:mod:`treeflux.runtime.response`).

The table is cut into blocks of rows (:func:`block_rows`: about a second of
work or less, never under ~0.1 s for real sweeps, bounded in memory). The
blocks depend only on the model, the request and ``n`` — never on where they
run — and each block draws its own rows from the one seeded stream (PCG64,
advanced to the block's first draw), so the table is the same, bit for bit,
whether the blocks run in this process, on a local Dask cluster
(``workers``; blocks run here while it starts) or on an existing one
(``client``, ``scheduler``). A block is a small task (the model pickles as its
recipe, the sweep as a few numbers), so a worker that dies loses nothing: the
scheduler runs its blocks again. Blocks come back in order whatever order
they finish in.
"""

from __future__ import annotations

import csv
import ctypes
import functools
import logging
import math
import os
import signal
import threading
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from . import kernel as _kernel
from .errors import EvaluationError, TreefluxError
from .resources import available_memory
from .progress import progress

__all__ = ["sample", "sample_ranges", "summarize", "write_table", "write_csv", "block_rows",
           "DEFAULT_DECADES", "RESPONSE_COLUMNS", "CURVE_COLUMNS"]

DEFAULT_DECADES = 1.0
RESPONSE_COLUMNS = ("ec10", "ec50", "ec90", "hill_effective", "max_log_slope",
                    "max_log_slope_at", "max_slope", "max_slope_at", "direction", "saturated")
# Columns that describe the shape of a curve within the range: their statistics
# are taken over curves that saturated within it (an unsaturated curve's EC
# values and Hill coefficient describe the range as much as the scheme).
CURVE_COLUMNS = RESPONSE_COLUMNS[:8]
# Work per block, in model evaluations (one parameter set through the kernel):
# about 0.4 s on the numpy back end for a small scheme, 0.15 s on LLVM —
# above the ~1 ms a Dask task costs, below the time a lost block costs again.
EVALS_PER_BLOCK = 1_000_000
# Model evaluations per response curve beyond its grid: EC solves (3 levels ×
# ~10 Illinois steps) and two golden-section searches (60 steps × 2 points).
RESPONSE_EXTRA_EVALS = 280
# Floats a block may hold at once (its output, or the response grid's states).
BLOCK_FLOATS = 2_000_000
# Resident memory of one worker process with numpy, dask and treeflux loaded
# (measured about 110 MB here; rounded up).
WORKER_BYTES = 200 * 2 ** 20
# How long to try reaching a scheduler given by address.
CONNECT_TIMEOUT = "10s"


def sample_ranges(model, *, values=None, decades: float = DEFAULT_DECADES) -> dict:
    """Sampling range (lo, hi) of every parameter not fixed by ``values``.

    Both bounds given: [min, max]. Otherwise the model's value v stands in
    for a missing bound: lo = v / 10^decades, hi = v · 10^decades. A
    parameter with neither is refused.
    """
    values = values or {}
    ranges = {}
    for name in model.info.parameters:
        if name in values:
            continue
        lo, hi = model.info.bounds.get(name, (None, None))
        v = model.info.defaults.get(name)
        if (lo is None or hi is None) and v is None:
            have = "no bounds" if lo is None and hi is None else f"only {'min' if hi is None else 'max'}"
            raise EvaluationError(f"parameter {name!r} has {have} and no value: give it min and max "
                                  f"(or a value to sample {decades:g} decades around), or fix it with --set")
        if lo is None:
            lo = v / 10.0 ** decades
        if hi is None:
            hi = v * 10.0 ** decades
        if not lo > 0:
            raise EvaluationError(f"parameter {name!r}: log-uniform sampling needs min > 0, got {lo:g}")
        ranges[name] = (float(lo), float(hi))
    return ranges


# ------------------------------------------------------------------ one block

@dataclass(frozen=True)
class Sweep:
    """Everything a block needs besides the model (a few numbers: cheap to ship)."""

    seed: int
    base: np.ndarray        # (n_symbols,) fixed values; sampled columns are overwritten
    columns: tuple          # symbol index of each sampled parameter
    logs: np.ndarray        # (k, 2): ln lo, ln hi of each sampled parameter
    task: dict | None       # response specification, or None for steady states


def draws(sweep: Sweep, start: int, stop: int) -> np.ndarray:
    """Sampled parameters of rows start:stop, (stop − start, k): the same
    numbers as rows start:stop of one ``default_rng(seed).random((n, k))``
    (PCG64 spends one 64-bit output per double; ``advance`` skips the rows before)."""
    k = len(sweep.columns)
    rng = np.random.default_rng(sweep.seed)
    rng.bit_generator.advance(start * k)
    U = rng.random((stop - start, k))
    lo, hi = sweep.logs[:, 0], sweep.logs[:, 1]
    return np.exp(lo + U * (hi - lo))


def _weighted(P: np.ndarray, W: np.ndarray) -> np.ndarray:
    """P @ W by elementwise steps in a fixed order: the same bits for a row
    whatever the batch, the process or its BLAS threads (OpenBLAS rounds the
    last row of a product differently with one thread than with several)."""
    out = np.zeros((P.shape[0], W.shape[1]))
    for j in range(P.shape[1]):
        out += P[:, j:j + 1] * W[j]
    return out


def _evaluate(model, X: np.ndarray, task) -> np.ndarray:
    if task is None:
        P = model.steady_state(X)
        if model.observable_names:
            return np.hstack([P, model.observables_from(X, P)])
        return P
    from .response import response_summaries
    s = response_summaries(model, X, skip_flat=True, **task)
    return np.stack([np.asarray(s[c], dtype=float) for c in RESPONSE_COLUMNS], axis=1)


def run_block(model, sweep: Sweep, start: int, stop: int) -> np.ndarray:
    """Rows start:stop of the table: sampled parameters, then outputs."""
    theta = draws(sweep, start, stop)
    X = np.repeat(sweep.base[None, :], stop - start, axis=0)
    X[:, list(sweep.columns)] = theta
    return np.hstack([theta, _evaluate(model, X, sweep.task)])


def _remote_block(model, sweep: Sweep, start: int, stop: int) -> np.ndarray:
    # A worker runs one task per thread it has: one kernel thread and one BLAS
    # thread per task (see _one_blas_thread).
    _kernel.set_default_threads(1)
    blas = _openblas()
    if blas is not None:
        blas[0](1)
    return run_block(model, sweep, start, stop)


@functools.lru_cache(maxsize=None)
def _openblas():
    """(set_num_threads, get_num_threads) of the OpenBLAS numpy loaded, or None."""
    try:
        with open("/proc/self/maps") as fh:
            paths = sorted({line.split()[-1] for line in fh if "openblas" in line.lower() and ".so" in line})
    except OSError:
        return None
    for path in paths:
        try:
            lib = ctypes.CDLL(path)
        except OSError:
            continue
        for name in ("scipy_openblas{}_num_threads64_", "openblas{}_num_threads64_", "openblas{}_num_threads"):
            setter = getattr(lib, name.format("_set"), None)
            getter = getattr(lib, name.format("_get"), None)
            if setter is not None and getter is not None:
                setter.argtypes = [ctypes.c_int]
                return setter, getter
    return None


@contextmanager
def _one_blas_thread():
    """Evaluate with one BLAS thread, as Dask workers do (OPENBLAS_NUM_THREADS=1):
    OpenBLAS rounds the last row of a matrix-vector product differently with
    one thread than with several, and the table must not depend on where a
    block ran. (Another BLAS than OpenBLAS is left alone.)"""
    blas = _openblas()
    if blas is None:
        yield
        return
    setter, getter = blas
    before = getter()
    setter(1)
    try:
        yield
    finally:
        setter(before)


def block_rows(model, task, n_columns: int) -> int:
    """Rows per block for this model and request (see the module doc)."""
    if task is None:
        evals, width = 1, n_columns
    else:
        evals = task["points"] + RESPONSE_EXTRA_EVALS
        width = task["points"] * len(model.states)
    return max(1, min(EVALS_PER_BLOCK // evals, BLOCK_FLOATS // max(1, width)))


# ------------------------------------------------------------------ guards

def _mib(b: float) -> str:
    return f"{b / 2 ** 20:,.0f} MiB"


def _check_memory(n: int, n_columns: int, workers: int | None) -> None:
    have = available_memory()
    if have is None:
        return
    table = 2 * n * n_columns * 8  # the blocks, then the table stacked from them
    if table > have:
        raise EvaluationError(f"{n:,} samples need about {_mib(table)} for the table "
                              f"({n_columns} columns of float64, twice while it is assembled); "
                              f"{_mib(have)} is available: ask for fewer samples")
    if workers and workers > 1 and workers * WORKER_BYTES > have:
        raise EvaluationError(f"{workers} worker processes need about {_mib(workers * WORKER_BYTES)} "
                              f"(about {_mib(WORKER_BYTES)} each); {_mib(have)} is available: "
                              f"use at most {max(1, have // WORKER_BYTES)} (this machine has "
                              f"{os.cpu_count() or 1} cores)")


def _check_count(value, what: str) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer, float)) \
            or not math.isfinite(value) or int(value) != value or value < 1:
        raise EvaluationError(f"{what} must be a positive integer, got {value!r}")
    return int(value)


# ------------------------------------------------------------------ sampling

def sample(model, n: int, *, seed: int = 0, values=None, decades: float = DEFAULT_DECADES,
           response: dict | None = None, workers: int | None = None, client=None,
           scheduler: str | None = None) -> dict:
    """Sample parameter space log-uniformly and evaluate every sample.

    Parameters
    ----------
    model : CompiledModel
    n : int
        Number of samples.
    seed : int
        Seed of the numpy generator (PCG64); same seed, same table, wherever
        it is computed.
    values : dict, optional
        Symbols held fixed (name → number); other inputs take the model's values.
    decades : float
        Half-width, in decades, of the range around a parameter that has a
        value but no bounds.
    response : dict, optional
        ``observable``, ``input``, ``lo``, ``hi`` and optionally ``points``:
        summarize each sample's response curve instead of its steady state.
    workers : int, optional
        Start a local Dask cluster of this many worker processes (one thread
        each) for this call; 1 (or None) evaluates in this process.
    client : dask.distributed.Client, optional
        Run on this client's cluster (left open).
    scheduler : str, optional
        Address of a running dask.distributed scheduler to connect to.

    Returns
    -------
    dict
        ``columns`` (names), ``data`` ((n, n_columns) float array: sampled
        parameters, then ``p_<state>`` and observables, or the response
        columns :data:`RESPONSE_COLUMNS`; NaN where a response is flat),
        ``ranges`` (parameter → [lo, hi]), ``fixed`` (symbol → value),
        ``seed``, ``response``, ``blocks`` (rows per block), ``note``.
    """
    n = _check_count(n, "number of samples")
    if sum(x is not None for x in (workers, client, scheduler)) > 1:
        raise EvaluationError("give one of workers, client or scheduler")
    if workers is not None:
        workers = _check_count(workers, "workers")
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise EvaluationError(f"seed must be a non-negative integer, got {seed!r}")
    values = dict(values or {})
    for k, v in values.items():
        if np.ndim(v) != 0:
            raise EvaluationError(f"fixed value of {k!r} must be a single number")
    task = None
    if response is not None:
        from .response import _input_column, _observable_weights, check_range
        task = {"observable": response["observable"], "input": response["input"],
                "lo": None, "hi": None, "points": _check_count(response.get("points", 41), "points")}
        task["lo"], task["hi"] = check_range(response["lo"], response["hi"])
        _observable_weights(model, task["observable"])
        _input_column(model, task["input"])
        values[task["input"]] = task["lo"]          # swept; the value is a placeholder
    ranges = sample_ranges(model, values=values, decades=decades)
    if not ranges:
        raise EvaluationError("nothing to sample: every parameter is fixed")
    names = list(ranges)
    if task is not None:
        outputs = list(RESPONSE_COLUMNS)
    else:
        outputs = [f"p_{s}" for s in model.states] + list(model.observable_names)
    clash = set(names) & set(outputs)
    if clash:
        raise EvaluationError(f"column name {sorted(clash)[0]!r} is both a parameter and an output")
    _check_memory(n, len(names) + len(outputs) + len(model.symbols), workers)
    symbols = model.symbols
    base = model.as_array({**values, **{k: ranges[k][0] for k in names}})[0]
    sweep = Sweep(seed=int(seed), base=base, columns=tuple(symbols.index(k) for k in names),
                  logs=np.log(np.array([ranges[k] for k in names])), task=task)
    rows = block_rows(model, task, len(names) + len(outputs))
    blocks = [(a, min(n, a + rows)) for a in range(0, n, rows)]
    with progress("sampling", total=n, unit="sample") as bar, _one_blas_thread():
        if client is not None:
            parts = _on_cluster(client, model, sweep, blocks, bar)
        elif scheduler is not None:
            with _connect(scheduler) as c:
                parts = _on_cluster(c, model, sweep, blocks, bar)
        elif workers is not None and workers > 1:
            parts = _on_new_cluster(workers, model, sweep, blocks, bar)
        else:
            parts = []
            for a, b in blocks:
                parts.append(run_block(model, sweep, a, b))
                bar.update(b - a)
    data = np.vstack(parts)
    fixed = {k: float(v) for k, v in zip(symbols, base) if k not in ranges}
    if task is not None:
        fixed.pop(task["input"], None)
    return {"columns": names + outputs, "data": data,
            "ranges": {k: list(v) for k, v in ranges.items()}, "fixed": fixed,
            "seed": int(seed), "response": task, "blocks": rows,
            "note": "model predictions of the scheme, not measurements"}


# ------------------------------------------------------------------ Dask

def _distributed():
    try:
        import dask.distributed as dd
    except ImportError:
        raise EvaluationError("running on several processes needs dask.distributed, which is not "
                              "installed (pip install 'treeflux[dask]')") from None
    return dd


@contextmanager
def _sigint_ignored():
    """Ignore SIGINT while a cluster starts: the worker processes started
    meanwhile inherit the ignored signal, so Ctrl-C at a terminal (sent to the
    whole process group) reaches this process alone, which then closes the
    cluster; workers would otherwise each print a traceback. (A Ctrl-C in
    the second or two of the start is lost.) Main thread only; a cluster
    started from another thread keeps the default."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)


# Worker housekeeping that takes CPU from blocks on a small machine: the
# statistical profiler (a stack sample every 10 ms) and the memory and system
# monitors (every 100 and 500 ms).
QUIET_WORKERS = {"distributed.worker.profile.enabled": False,
                 "distributed.worker.memory.monitor-interval": "1s",
                 "distributed.admin.system-monitor.interval": "2s",
                 "distributed.admin.tick.interval": "500ms",
                 "distributed.scheduler.work-stealing": False}

# Modules a worker needs for a block, imported once by the fork server.
_WORKER_MODULES = ["treeflux.runtime.sampling", "treeflux.runtime.response", "treeflux.runtime.model"]


def _start_fork_server() -> bool:
    """Start this process's fork server, if the platform has one and it is not
    running yet, preloading dask.distributed and the modules a worker needs
    (:data:`_WORKER_MODULES`); returns whether workers can be forked from it.
    It returns at once: the server imports in its own process, on the other
    core, while this one imports dask itself (about 0.3 s each)."""
    import multiprocessing

    if "forkserver" not in multiprocessing.get_all_start_methods():
        return False
    import multiprocessing.forkserver as fs

    fs.set_forkserver_preload(["distributed", *_WORKER_MODULES])
    fs.ensure_running()
    return True


def _new_cluster(workers: int):
    """A LocalCluster of single-threaded worker processes.

    - Dask starts workers with MALLOC_TRIM_THRESHOLD_ set, which turns off
      glibc's adaptive mmap threshold: every large numpy temporary is then
      mapped and unmapped again, and response blocks ran ~1.5x slower in
      workers than here (measured). Ours start without it.
    - Where the platform has it, workers are forked from a fork server that
      has imported dask, numpy and treeflux's runtime once (a clean,
      single-threaded process, not this one), instead of each spawned worker
      importing them again: about 0.4 s of CPU less per worker, which on a
      two-core machine is CPU the sweep gets (a ≈10 s sweep on two workers
      went from 1.63–1.68× to 1.75–1.83× the one-process time, measured).
    """
    method = "forkserver" if _start_fork_server() else "spawn"   # first: it imports beside dask's import here
    dd = _distributed()
    import dask.config

    with dask.config.set({"distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None,
                          "distributed.worker.multiprocessing-method": method,
                          **QUIET_WORKERS}):
        return dd.LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                               dashboard_address=":0", silence_logs=logging.CRITICAL)


def _balanced(blocks: list, workers: int) -> list:
    """``blocks`` with the last 2 · ``workers`` of them halved: the workers
    then run out of work at nearly the same moment (the table is the same for
    any cut of the rows into blocks)."""
    k = max(0, len(blocks) - 2 * workers)
    tail = []
    for a, b in blocks[k:]:
        m = (a + b + 1) // 2
        tail += [(a, m), (m, b)] if a < m < b else [(a, b)]
    return blocks[:k] + tail


def _on_new_cluster(workers: int, model, sweep: Sweep, blocks, bar) -> list:
    """Start a LocalCluster of ``workers`` single-threaded processes, run the
    blocks on it (the last ones halved, :func:`_balanced`) and close it
    however this ends.

    This process computes nothing while the cluster starts. It used to run
    blocks meanwhile, but on two cores those blocks took the GIL and a core
    from the start (dask's import, the scheduler's and nannies' event loop,
    the fork server's imports) and slowed it more than they gained: 0.65 s to
    the first task against 0.45 s idle, 2.40 s against 2.32 s for a 2 s sweep,
    1.65-1.77x against 1.77-1.81x for a 12 s one (measured here)."""
    with _sigint_ignored():
        try:
            cluster = _new_cluster(workers)
        except TreefluxError:
            raise
        except Exception as exc:  # noqa: BLE001 — any failure to start is one line
            first = (str(exc).splitlines() or [type(exc).__name__])[0]
            raise EvaluationError(f"could not start {workers} local workers: {first}") from None
    try:
        with _distributed().Client(cluster) as client:
            return _on_cluster(client, model, sweep, _balanced(list(blocks), workers), bar)
    finally:
        cluster.close()


@contextmanager
def _connect(address: str):
    dd = _distributed()
    try:
        client = dd.Client(address, timeout=CONNECT_TIMEOUT)
    except (OSError, TimeoutError, ValueError) as exc:
        raise EvaluationError(f"cannot reach the Dask scheduler at {address}: "
                              f"{str(exc).splitlines()[0] if str(exc) else type(exc).__name__}") from None
    with client:
        yield client


def _on_cluster(client, model, sweep: Sweep, blocks, bar) -> list:
    """Run the blocks as tasks, collect them in order as they finish."""
    dd = _distributed()
    futures = [client.submit(_remote_block, model, sweep, a, b, pure=False) for a, b in blocks]
    where = {f.key: i for i, f in enumerate(futures)}
    parts: list = [None] * len(futures)
    try:
        for future in dd.as_completed(futures):
            i = where[future.key]
            a, b = blocks[i]
            try:
                parts[i] = future.result()
            except TreefluxError:
                raise
            except dd.KilledWorker:
                raise EvaluationError(f"samples {a}-{b - 1}: the workers that ran them died "
                                      "(repeatedly); nothing was written") from None
            except Exception as exc:
                first = (str(exc).splitlines() or [""])[0]
                raise EvaluationError(f"samples {a}-{b - 1} failed on the cluster: "
                                      f"{type(exc).__name__}: {first}") from exc
            bar.update(b - a)
    finally:
        if any(p is None for p in parts):
            client.cancel(futures)
    return parts


# ------------------------------------------------------------------ summaries

def summarize(result: dict) -> dict:
    """Statistics of each column (min, median, max, count of finite values).

    For response samples, the curve columns (:data:`CURVE_COLUMNS`) are
    summarized over the curves that saturated within the range only; the
    counts of saturated, unsaturated and flat curves are given under
    ``curves``. Parameter columns are summarized over every sample.
    """
    cols, data = result["columns"], result["data"]
    keep = np.ones(len(data), dtype=bool)
    out: dict = {"columns": {}}
    if result.get("response") is not None:
        saturated = data[:, cols.index("saturated")] == 1
        flat = data[:, cols.index("direction")] == 0
        task = result["response"]
        out["curves"] = {
            "saturated": int(saturated.sum()),
            "unsaturated": int((~saturated & ~flat).sum()),
            "flat": int(flat.sum()),
            "note": (f"statistics of {', '.join(CURVE_COLUMNS)} are over the curves that saturated "
                     f"within [{task['lo']:g}, {task['hi']:g}]; the others still change at an end "
                     "of the range, so their EC values and Hill coefficients describe the range"),
        }
        keep = saturated
    for c, name in enumerate(cols):
        col = data[keep, c] if name in CURVE_COLUMNS else data[:, c]
        col = col[np.isfinite(col)]
        out["columns"][name] = ({"min": float(col.min()), "median": float(np.median(col)),
                                 "max": float(col.max()), "count": int(col.size)}
                                if col.size else {"count": 0})
    return out


# ------------------------------------------------------------------ output

# A text cell starting with one of these is a formula to a spreadsheet
# (common practice, "CSV injection"): it is written with a leading apostrophe.
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def _text_cell(text: str) -> str:
    return "'" + text if text.startswith(_FORMULA_START) else text


def write_csv(result: dict, fh) -> None:
    """The table as CSV on a text stream: a header of column names (quoted
    where they hold commas or quotes, and never read as a formula), then rows
    of numbers with 17 significant digits (they round-trip float64)."""
    writer = csv.writer(fh, lineterminator="\n")
    writer.writerow([_text_cell(str(c)) for c in result["columns"]])
    for start in range(0, len(result["data"]), 10_000):
        writer.writerows([[f"{v:.17g}" for v in row] for row in result["data"][start:start + 10_000].tolist()])


def write_table(result: dict, path) -> Path:
    """Write a :func:`sample` result atomically through :mod:`~treeflux.runtime.safe_io`.

    ``.npz`` writes arrays ``data`` and ``columns``; anything else is CSV
    (:func:`write_csv`).
    """
    from .safe_io import output_path

    path = Path(path)
    with output_path(path) as tmp:
        if path.suffix == ".npz":
            np.savez(tmp, data=result["data"], columns=np.array(result["columns"]))
        else:
            with open(tmp, "w", newline="", encoding="utf-8") as fh:
                write_csv(result, fh)
    return path
