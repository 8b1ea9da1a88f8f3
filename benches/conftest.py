"""Shared fixtures of the benchmark suite (``python -m pytest benches --benchmark-only``).

- Collects ``bench_*.py`` when the directory is given (pytest itself only
  collects ``test_*.py``; files named on the command line are collected as usual).
- Points the treeflux compile cache at a fresh temporary directory for the
  session, so compile times are cold (set ``TREEFLUX_BENCH_WARM_CACHE=1`` to
  keep the user's cache), and removes it afterwards.
- Compiles each (scheme, back end, jacobian) once per session and remembers the
  cold compile time; draws the parameter sets once per scheme.
- ``RESULTS`` collects figures that later benches compare (ratios in one run).
"""

from __future__ import annotations

import atexit
import os
import shutil
import statistics
import tempfile
import time

import pytest

if not os.environ.get("TREEFLUX_BENCH_WARM_CACHE"):
    _CACHE = tempfile.mkdtemp(prefix="treeflux-bench-cache-")
    os.environ["TREEFLUX_CACHE_DIR"] = _CACHE
    atexit.register(shutil.rmtree, _CACHE, ignore_errors=True)

import baselines as B  # noqa: E402  (benches/ is on sys.path under pytest's prepend import mode)

RESULTS: dict = {}

# name: (edges builder, rate columns are the edge symbols)
SCHEMES = {
    "Q3": lambda: B.hypercube_edges(3),
    "Q4": lambda: B.hypercube_edges(4),
    "Q6": lambda: B.hypercube_edges(6),
    "random200": lambda: B.random_edges(200, 600, seed=1),
}


def pytest_collect_file(file_path, parent):
    if (file_path.suffix == ".py" and file_path.name.startswith("bench_")
            and not parent.session.isinitpath(file_path)):
        return pytest.Module.from_parent(parent, path=file_path)
    return None


def median_time(fn, *, repeat: int = 5, budget: float = 20.0) -> float:
    """Median wall time of ``fn()`` over ``repeat`` runs (fewer past ``budget`` s)."""
    times: list[float] = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
        if sum(times) > budget:
            break
    return statistics.median(times)


class Models:
    """Session store: graphs, schemes, compiled models with their cold compile time."""

    def __init__(self):
        self._graphs: dict = {}
        self._models: dict = {}

    def graph(self, name: str):
        if name not in self._graphs:
            n, edges = SCHEMES[name]()
            self._graphs[name] = (n, edges, B.edge_scheme(name.lower(), n, edges))
        return self._graphs[name]

    def get(self, name: str, backend: str, *, method: str = "auto", jacobian: bool = False):
        """``(model, compile_seconds, edges_in_model_order, rate_columns)``."""
        from treeflux.compiler import compile_scheme

        key = (name, backend, method, jacobian)
        if key not in self._models:
            n, edges, scheme = self.graph(name)
            t0 = time.perf_counter()
            m = compile_scheme(scheme, method=method, backend=backend, jacobian=jacobian)
            dt = time.perf_counter() - t0
            mapped, cols = B.layout(m, n, edges)
            self._models[key] = (m, dt, mapped, cols)
        return self._models[key]


@pytest.fixture(scope="session")
def models():
    from treeflux.compiler import compile_scheme

    # pay the one-off imports (SymPy, networkx, the cache, numba) outside any timing
    n, edges = B.hypercube_edges(2)
    compile_scheme(B.edge_scheme("warmup", n, edges), backend="python")
    return Models()


@pytest.fixture(scope="session")
def results():
    return RESULTS
