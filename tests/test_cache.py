"""The compile cache: atomic publication, concurrent builders, corrupt entries."""

import json
import multiprocessing as mp
import os
import time
from pathlib import Path

import pytest

from treeflux.compiler.cli import main
from treeflux.runtime import cache


@pytest.fixture
def cache_dir(tmp_path, monkeypatch):
    monkeypatch.setenv("TREEFLUX_CACHE_DIR", str(tmp_path / "cache"))
    return tmp_path / "cache"


def _slow_build(key, log_dir):
    def build(work: Path):
        (Path(log_dir) / f"build-{os.getpid()}").write_text("built")
        time.sleep(0.3)
        (work / "artifact.txt").write_text("payload " * 1000)
    return str(cache.fetch(key, build))


def _worker(args):
    key, log_dir, cache_root = args
    os.environ["TREEFLUX_CACHE_DIR"] = cache_root
    return _slow_build(key, log_dir)


def test_concurrent_processes_build_once(cache_dir, tmp_path):
    logs = tmp_path / "logs"
    logs.mkdir()
    key = cache.make_key("concurrency-test")
    ctx = mp.get_context("spawn")
    with ctx.Pool(4) as pool:
        paths = pool.map(_worker, [(key, str(logs), str(cache_dir))] * 4)
    assert len(set(paths)) == 1
    assert len(list(logs.iterdir())) == 1  # exactly one process built it
    assert (Path(paths[0]) / "artifact.txt").read_text() == "payload " * 1000
    leftovers = [p for p in cache_dir.iterdir() if p.name.startswith(".build-")]
    assert leftovers == []


def test_truncated_entry_is_rebuilt(cache_dir, tmp_path):
    builds = []

    def build(work):
        builds.append(1)
        (work / "lib.bin").write_bytes(b"x" * 4096)

    key = cache.make_key("truncation-test")
    entry = cache.fetch(key, build)
    (entry / "lib.bin").write_bytes(b"x" * 100)  # a crash mid-write
    entry2 = cache.fetch(key, build)
    assert len(builds) == 2 and (entry2 / "lib.bin").read_bytes() == b"x" * 4096
    (entry2 / cache.MANIFEST).unlink()  # no manifest: never published
    cache.fetch(key, build)
    assert len(builds) == 3
    cache.fetch(key, build)
    assert len(builds) == 3  # valid entries are reused


def test_failed_build_leaves_nothing(cache_dir):
    def build(work):
        (work / "half").write_text("partial")
        raise RuntimeError("compiler exploded")

    key = cache.make_key("failure-test")
    with pytest.raises(RuntimeError):
        cache.fetch(key, build)
    assert not (cache_dir / key).exists()
    assert [p for p in cache_dir.iterdir() if p.name.startswith(".build-")] == []


def test_shared_library_and_cli(cache_dir, capsys):
    lib = cache.shared_library("double twice(double x) { return 2 * x; }\n")
    import ctypes
    f = ctypes.CDLL(str(lib)).twice
    f.restype, f.argtypes = ctypes.c_double, [ctypes.c_double]
    assert f(21.0) == 42.0
    assert main(["cache", "info"]) == 0
    info = json.loads(capsys.readouterr().out)
    assert info["entries"] == 1 and info["location"] == str(cache_dir)
    assert main(["cache", "clear"]) == 0
    assert "removed 1" in capsys.readouterr().out
    assert cache.info()["entries"] == 0
    with pytest.raises(cache.CompileError, match="C compilation failed"):
        cache.shared_library("this is not C")


def test_key_depends_on_everything():
    assert cache.make_key("a", "b") != cache.make_key("a", "c")
    assert cache.make_key("a", "b") == cache.make_key("a", "b")


def test_compiled_model_cache_hit_skips_the_compiler(cache_dir, monkeypatch):
    import numpy as np
    import treeflux.compiler.pipeline as pipeline
    from treeflux.compiler import compile_scheme
    from .schemes import independent_sites

    s = independent_sites(2)
    first = compile_scheme(s, method="elimination", backend="c", jacobian=True)
    assert first.profile.get("cache") is None

    def refuse(*args, **kwargs):
        raise AssertionError("front end ran on a cache hit")

    original = pipeline.build
    monkeypatch.setattr(pipeline, "build", refuse)
    again = compile_scheme(s, method="elimination", backend="c", jacobian=True)
    assert again.profile["cache"] == "hit" and again.method == "elimination"
    X = np.array([[1.0, 2.0, 3.0, 4.0], [0.5, 0.1, 9.0, 2.0]])
    assert np.array_equal(first.steady_state(X), again.steady_state(X))
    assert np.array_equal(first.jacobian(X), again.jacobian(X))
    # A different option is a different entry: the front end must run.
    with pytest.raises(AssertionError, match="front end ran"):
        compile_scheme(s, method="elimination", backend="c", jacobian=False)
    # A corrupt entry is not trusted: it is rebuilt.
    from treeflux.compiler.artifacts import model_key
    options = {"jacobian": True, "log_jacobian": False, "jacobian_form": "log", "input_derivatives": None,
                   "name": "treeflux_model"}
    entry = cache_dir / model_key(s, method="elimination", backend="c", options=options)
    (entry / "model.json").write_text("{}")
    monkeypatch.setattr(pipeline, "build", original)
    rebuilt = compile_scheme(s, method="elimination", backend="c", jacobian=True)
    assert rebuilt.profile.get("cache") is None
    assert np.array_equal(rebuilt.steady_state(X), first.steady_state(X))
