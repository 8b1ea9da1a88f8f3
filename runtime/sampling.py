"""Sampling parameter space: what can a scheme do?

Each free parameter θ is drawn log-uniformly, ln θ ~ U(ln lo, ln hi), from
its bounds in the model; a parameter with only a value spans
``DEFAULT_DECADES`` decades either side of it; parameters given in
``values`` are held fixed. Each sample is then evaluated: its steady state
and observables, or — with a response specification — the summary of its
response curve (ec50, effective Hill coefficient, steepest log-slope; see
:mod:`treeflux.runtime.response`). Draws come from one seeded generator in
the calling process, so the table does not depend on how the evaluation is
split across processes.

Evaluation runs in this process, in a multiprocessing pool (``workers``),
or on a dask.distributed cluster (``scheduler``, if dask is installed).
Workers receive the model's metadata and kernels, which pickle through their
recipes; when they do not, a picklable ``rebuild`` callable (for example one
that recompiles the model file) is sent instead.
"""

from __future__ import annotations

import math
import pickle
from pathlib import Path

import numpy as np

from .errors import EvaluationError

__all__ = ["sample", "sample_ranges", "write_table", "DEFAULT_DECADES", "RESPONSE_COLUMNS"]

DEFAULT_DECADES = 1.0
RESPONSE_COLUMNS = ("ec10", "ec50", "ec90", "hill_effective", "max_log_slope",
                    "max_log_slope_at", "max_slope", "max_slope_at", "direction", "saturated")
# rows per task: big enough to amortize the pool's per-task cost, small
# enough for the response grid (points × rows evaluations) to fit in memory
_STEADY_CHUNK = 20_000
_RESPONSE_CHUNK = 500


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
            raise EvaluationError(f"parameter {name!r}: log-uniform sampling needs min > 0, got {lo}")
        ranges[name] = (float(lo), float(hi))
    return ranges


# ------------------------------------------------------------------ workers

_WORKER: dict = {}


def _payload(model, rebuild):
    """What a worker process needs to rebuild the model."""
    try:
        blob = pickle.dumps((model.info, model.kernel, model.label_kernel))
        return ("parts", blob)
    except Exception:
        if rebuild is None:
            raise EvaluationError("this model's compiled kernel cannot be sent to worker processes; "
                                  "pass rebuild= (the command line recompiles from the model file)") from None
        return ("rebuild", pickle.dumps(rebuild))


def _model_from(payload):
    kind, blob = payload
    if kind == "parts":
        from .model import CompiledModel
        info, kernel, labels = pickle.loads(blob)
        return CompiledModel(info, kernel, labels)
    return pickle.loads(blob)()


def _init_worker(payload, task):
    _WORKER["model"] = _model_from(payload)
    _WORKER["task"] = task


def _run_chunk(X):
    return _evaluate(_WORKER["model"], X, _WORKER["task"])


def _run_remote(payload, task, X):
    return _evaluate(_model_from(payload), X, task)


def _evaluate(model, X, task) -> np.ndarray:
    if task is None:
        P = model.steady_state(X)
        if model.observable_names:
            return np.hstack([P, model.observables_from(X, P)])
        return P
    from .response import response_summaries
    s = response_summaries(model, X, skip_flat=True, **task)
    return np.stack([s[c].astype(float) for c in RESPONSE_COLUMNS], axis=1)


# ------------------------------------------------------------------ sampling

def sample(model, n: int, *, seed: int = 0, values=None, decades: float = DEFAULT_DECADES,
           response: dict | None = None, workers: int | None = None,
           scheduler: str | None = None, rebuild=None) -> dict:
    """Sample parameter space log-uniformly and evaluate every sample.

    Parameters
    ----------
    model : CompiledModel
    n : int
        Number of samples.
    seed : int
        Seed of the numpy generator (PCG64); same seed, same table.
    values : dict, optional
        Symbols held fixed (name → number); other inputs take the model's values.
    decades : float
        Half-width, in decades, of the range around a parameter that has a
        value but no bounds.
    response : dict, optional
        ``observable``, ``input``, ``lo``, ``hi`` and optionally ``points``:
        summarize each sample's response curve instead of its steady state.
    workers : int, optional
        Evaluate in a multiprocessing pool of this many processes.
    scheduler : str, optional
        Address of a dask.distributed scheduler (needs dask installed).
    rebuild : callable, optional
        Picklable zero-argument callable returning the model, sent to workers
        when the model's kernels cannot be pickled.

    Returns
    -------
    dict
        ``columns`` (names), ``data`` ((n, n_columns) float array: sampled
        parameters, then ``p_<state>`` and observables, or the response
        columns :data:`RESPONSE_COLUMNS`; NaN where a response is flat),
        ``ranges`` (parameter → [lo, hi]), ``fixed`` (symbol → value),
        ``seed``, ``note``.
    """
    if isinstance(n, bool) or int(n) != n or n < 1:
        raise EvaluationError(f"number of samples must be a positive integer, got {n!r}")
    n = int(n)
    if workers is not None and scheduler is not None:
        raise EvaluationError("give either workers or scheduler, not both")
    if workers is not None and (int(workers) != workers or workers < 1):
        raise EvaluationError(f"workers must be a positive integer, got {workers!r}")
    values = dict(values or {})
    for k, v in values.items():
        if np.ndim(v) != 0:
            raise EvaluationError(f"fixed value of {k!r} must be a single number")
    task = None
    if response is not None:
        from .response import _input_column, _observable_weights, check_range
        task = {"observable": response["observable"], "input": response["input"],
                "lo": None, "hi": None, "points": int(response.get("points", 41))}
        task["lo"], task["hi"] = check_range(response["lo"], response["hi"])
        _observable_weights(model, task["observable"])
        _input_column(model, task["input"])
        values[task["input"]] = task["lo"]          # swept; the value is a placeholder
    ranges = sample_ranges(model, values=values, decades=decades)
    if not ranges:
        raise EvaluationError("nothing to sample: every parameter is fixed")
    names = list(ranges)
    rng = np.random.default_rng(seed)
    logs = np.log(np.array([ranges[k] for k in names]))
    U = rng.random((n, len(names)))
    theta = np.exp(logs[:, 0] + U * (logs[:, 1] - logs[:, 0]))
    X = model.as_array({**values, **{k: theta[:, c] for c, k in enumerate(names)}})
    X = np.ascontiguousarray(np.broadcast_to(X, (n, X.shape[1])))
    if task is not None:
        columns = list(RESPONSE_COLUMNS)
    else:
        columns = [f"p_{s}" for s in model.states] + list(model.observable_names)
    clash = set(names) & set(columns)
    if clash:
        raise EvaluationError(f"column name {sorted(clash)[0]!r} is both a parameter and an output")
    chunk = _RESPONSE_CHUNK if task is not None else _STEADY_CHUNK
    if workers and workers > 1 or scheduler:
        chunk = max(1, min(chunk, math.ceil(n / (4 * (workers or 4)))))
    pieces = [X[a:a + chunk] for a in range(0, n, chunk)]
    if scheduler:
        results = _dask_map(model, rebuild, task, pieces, scheduler)
    elif workers and workers > 1:
        import multiprocessing as mp
        payload = _payload(model, rebuild)
        with mp.get_context().Pool(int(workers), initializer=_init_worker,
                                    initargs=(payload, task)) as pool:
            results = pool.map(_run_chunk, pieces)
    else:
        results = [_evaluate(model, piece, task) for piece in pieces]
    data = np.hstack([theta, np.vstack(results)])
    fixed = {k: float(v) for k, v in zip(model.symbols, X[0]) if k not in ranges}
    if task is not None:
        fixed.pop(task["input"], None)
    return {"columns": names + columns, "data": data,
            "ranges": {k: list(v) for k, v in ranges.items()}, "fixed": fixed,
            "seed": seed, "response": task,
            "note": "model predictions of the scheme, not measurements"}


def _dask_map(model, rebuild, task, pieces, address):
    try:
        from dask.distributed import Client
    except ImportError:
        raise EvaluationError("--scheduler needs dask.distributed, which is not installed "
                              "(pip install 'dask[distributed]'), or use --workers") from None
    payload = _payload(model, rebuild)
    with Client(address) as client:
        futures = [client.submit(_run_remote, payload, task, piece, pure=False) for piece in pieces]
        return client.gather(futures)


# ------------------------------------------------------------------ output

def write_table(result: dict, path) -> Path:
    """Write a :func:`sample` result atomically through :mod:`treeflux.runtime.safe_io`
    (exclusive temporary in the target folder, then rename; never through a link).

    ``.npz`` writes arrays ``data`` and ``columns``; anything else is CSV
    with a header row and 17 significant digits (round-trips float64).
    """
    import io
    from .safe_io import write_file
    fh = io.BytesIO()
    if Path(path).suffix == ".npz":
        np.savez(fh, data=result["data"], columns=np.array(result["columns"]))
    else:
        header = ",".join(result["columns"])
        np.savetxt(fh, result["data"], delimiter=",", header=header, comments="", fmt="%.17g")
    return write_file(path, fh.getvalue())
