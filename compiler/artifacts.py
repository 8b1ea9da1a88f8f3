"""Whole compiled models in the on-disk cache.

A compiled model is stored as data: the generated source its kernel is
rebuilt from (the kernel's *recipe*), the runtime metadata and the compile
profile, as JSON, under a key that hashes the canonical scheme, the method,
the options, the treeflux version, the back end and the host CPU
(:func:`treeflux.runtime.cache.make_key` adds the host). A hit skips the
front end, the passes and code generation; native back ends then find their
binaries in the cache too. Nothing from the cache is unpickled, and nothing
is read or executed before :func:`treeflux.runtime.cache.lookup` has verified
the entry: owned by this user, not writable by others, and sealed with this
user's secret key (an HMAC over the files' hashes), so an entry edited on
disk or planted by someone else is moved aside and rebuilt, never run.
"""

from __future__ import annotations

import importlib
import json
from dataclasses import asdict

from treeflux.runtime import cache
from treeflux.runtime.model import ModelInfo

# Which function of each back end rebuilds a kernel from its recipe arguments.
LOADERS = {
    "python": "load_source",
    "c": "build_from_source",
    "cython": "build_from_source",
    "llvm": "compile_text",
}
FILE = "model.json"


def model_key(scheme, *, method: str, backend: str, options: dict) -> str:
    from . import __version__
    return cache.make_key("compiled-model", __version__, scheme.canonical(), method, backend,
                          json.dumps(options, sort_keys=True))


def store(key: str, kernel, info: ModelInfo, profile: dict) -> None:
    func, args = kernel.recipe
    record = {"backend": kernel.backend, "loader": func.__name__, "args": _jsonable(args),
              "info": _jsonable(asdict(info)), "profile": _jsonable(profile)}
    if LOADERS.get(kernel.backend) != func.__name__:
        raise RuntimeError(f"unexpected recipe {func.__name__} for back end {kernel.backend}")
    text = json.dumps(record, sort_keys=True)
    cache.fetch(key, lambda work: (work / FILE).write_text(text))


def load(key: str):
    """(kernel, info, profile) from the cache, or None if absent."""
    entry = cache.lookup(key)
    if entry is None:
        return None
    try:
        record = json.loads((entry / FILE).read_text())
        backend = record["backend"]
        if LOADERS[backend] != record["loader"]:
            return None
        module = importlib.import_module(f"treeflux.compiler.backends.{backend}")
        loader = getattr(module, LOADERS[backend])
        kernel = loader(*_args(backend, record["args"]))
        info = ModelInfo(**record["info"])
        info.edges = [tuple(e) for e in info.edges]
        info.groups = {k: tuple(v) for k, v in info.groups.items()}
        return kernel, info, record["profile"]
    except (OSError, ValueError, KeyError, TypeError):
        return None


def _args(backend: str, args: list) -> list:
    if backend == "c":  # (sources dict, name, n_in, n_out, flags tuple)
        sources, name, n_in, n_out, flags = args
        return [dict(sources), name, n_in, n_out, tuple(flags)]
    return list(args)


def _jsonable(obj):
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if hasattr(obj, "item"):
        return obj.item()
    return obj
