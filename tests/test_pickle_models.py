"""CompiledModel pickles as data and comes back identical in a fresh process.

A compiled model travels to Dask workers as its recipe (the scheme and the
compile options; or, without a recipe, its metadata and the kernels'
generated source) — never as a JIT engine or a loaded library — and is
rebuilt once per process through the compile cache.
"""

import json
import pickle
import subprocess
import sys

import numpy as np
import pytest

from treeflux.compiler import Scheme, compile_scheme
from treeflux.runtime.model import CompiledModel

from .schemes import mp_steady_state

BACKENDS = ("python", "c", "cython", "llvm")


def promoter():
    """A driven 4-state cycle with a concentration input and two observables."""
    s = Scheme(name="pickled promoter")
    s.add_parameter("kon", value=2.0, min=0.1, max=10.0)
    s.add_parameter("koff", value=1.0, min=0.1, max=10.0)
    s.add_parameter("kcat", value=3.0, min=0.1, max=10.0)
    s.add_parameter("kr", value=0.5, min=0.1, max=10.0)
    s.add_input("c", value=1.0)
    s.add_edge("E", "EA", "kon*c")
    s.add_edge("EA", "E", "koff")
    s.add_edge("EA", "EB", "kcat")
    s.add_edge("EB", "E", "kr")
    s.add_edge("EB", "EA", "kr*kr")
    s.add_observable("bound", {"EA": 1.0, "EB": 1.0})
    s.add_observable("product_side", {"EB": 2.0})
    return s


def inputs(m, n=64, seed=11):
    rng = np.random.default_rng(seed)
    return np.exp(rng.uniform(np.log(0.05), np.log(20.0), size=(n, len(m.symbols))))


def child(code: str, blob: bytes) -> dict:
    """Run ``code`` in a fresh interpreter with ``blob`` on stdin; its JSON stdout."""
    res = subprocess.run([sys.executable, "-c", code], input=blob, capture_output=True, timeout=300)
    assert res.returncode == 0, res.stderr.decode()[-2000:]
    return json.loads(res.stdout)


CHILD = r"""
import json, pickle, sys
import numpy as np
import treeflux.runtime.model, treeflux.runtime.sampling, treeflux.runtime.kernel
before = sorted(m for m in sys.modules if m.startswith("treeflux.compiler"))
blobs, X = pickle.loads(sys.stdin.buffer.read())
out = {"compiler_before_unpickling": before, "models": []}
for blob in blobs:
    m = pickle.loads(blob)
    again = pickle.loads(blob)
    out["models"].append({
        "backend": m.backend, "method": m.method, "states": list(m.states),
        "observables": list(m.observable_names), "same_object": m is again,
        "P": m.steady_state(X).tobytes().hex(), "O": m.observables(X).tobytes().hex(),
    })
from treeflux.compiler import pipeline
out["rebuilt"] = len(pipeline._REBUILT)
sys.stdout.write(json.dumps(out))
"""


@pytest.fixture(scope="module")
def models():
    s = promoter()
    return s, {b: compile_scheme(s, backend=b) for b in BACKENDS}


def test_every_backend_round_trips_in_a_fresh_process(models):
    s, ms = models
    X = inputs(ms["python"])
    blobs = [pickle.dumps(ms[b]) for b in BACKENDS]
    sizes = {b: len(blob) for b, blob in zip(BACKENDS, blobs)}
    for blob in blobs:
        # data only: no handle of a JIT engine or a loaded library in the bytes
        for word in (b"ctypes", b"llvmlite", b"CFUNCTYPE", b"CDLL", b"_engine"):
            assert word not in blob
        assert b"rebuild_model" in blob and b"treeflux.compiler.pipeline" in blob
    assert max(sizes.values()) < 8192, sizes
    out = child(CHILD, pickle.dumps((blobs, X)))
    # the runtime alone never imports the compiler; pickle imports it by module path
    assert out["compiler_before_unpickling"] == []
    assert out["rebuilt"] == len(BACKENDS)                  # one compile per model and process
    for b, got in zip(BACKENDS, out["models"]):
        m = ms[b]
        assert got["backend"] == b and got["method"] == m.method
        assert got["states"] == list(m.states) and got["observables"] == list(m.observable_names)
        assert got["same_object"]                            # unpickled twice, rebuilt once
        P = np.frombuffer(bytes.fromhex(got["P"])).reshape(len(X), -1)
        O = np.frombuffer(bytes.fromhex(got["O"])).reshape(len(X), -1)
        assert np.array_equal(P, m.steady_state(X))         # bit for bit
        assert np.array_equal(O, m.observables(X))
    # and right: mpmath at 50 digits on the first rows (outside reference)
    edges = s.edge_list()
    for row in X[:4]:
        kon, koff, kcat, kr, c = row
        ref = mp_steady_state(len(s.states), edges, [kon * c, koff, kcat, kr, kr * kr])
        np.testing.assert_allclose(ms["llvm"].steady_state(row[None])[0], ref, rtol=1e-13)


def test_pickle_is_a_snapshot_of_the_scheme(models):
    s = promoter()
    m = compile_scheme(s, backend="python")
    blob = pickle.dumps(m)
    s.add_edge("E", "EB", "kcat")                 # edited after compiling: the model is unchanged
    assert pickle.dumps(m) == blob
    again = pickle.loads(blob)
    X = inputs(m, 8)
    assert again.states == m.states and np.array_equal(again.steady_state(X), m.steady_state(X))
    # the rebuilt model keeps what the compiler gives: closed forms and emitters
    assert str(again.formula("E")) == str(m.formula("E"))


def test_options_travel_with_the_model():
    s = promoter()
    m = compile_scheme(s, backend="python", method="trees", jacobian=True, log_jacobian=True)
    again = pickle.loads(pickle.dumps(m))
    X = inputs(m, 16)
    assert again.method == "trees" and again.info.log_jacobian
    assert np.array_equal(again.jacobian(X), m.jacobian(X))


@pytest.mark.parametrize("backend", ["python", "llvm"])
def test_a_model_without_recipe_travels_as_its_generated_source(backend):
    m = compile_scheme(promoter(), backend=backend)
    bare = CompiledModel(m.info, m.kernel, m.label_kernel)    # built by hand: no compiler recipe
    blob = pickle.dumps(bare)
    assert b"rebuild_model" not in blob and b"ctypes" not in blob and b"llvmlite.binding" not in blob
    X = inputs(m, 32)
    code = ("import json, pickle, sys; b, X = pickle.loads(sys.stdin.buffer.read()); m = pickle.loads(b); "
            "sys.stdout.write(json.dumps(m.steady_state(X).tobytes().hex()))")
    got = np.frombuffer(bytes.fromhex(child(code, pickle.dumps((blob, X))))).reshape(len(X), -1)
    assert np.array_equal(got, m.steady_state(X))


def test_runtime_import_does_not_import_the_compiler():
    code = ("import json, sys; import treeflux.runtime.analysis, treeflux.runtime.model, "
            "treeflux.runtime.sampling; "
            "sys.stdout.write(json.dumps(sorted(m for m in sys.modules "
            "if m.startswith(('treeflux.compiler', 'dask', 'distributed')))))")
    assert child(code, b"") == []
