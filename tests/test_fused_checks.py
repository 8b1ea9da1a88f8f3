"""The checks fused into the compiled kernels (issue 11, item 1).

Every back end's runtime kernel tests the symbols, the probability row sums
and the observables while it holds a block of rows, and writes one status
byte per row; the runtime looks at the status only when rows are flagged.
These tests compare that path with the one it replaced — the same model with
``_use_fused = False`` runs the checks as separate numpy passes around the
raw kernel — and demand the same bits and the same refusals, word for word,
for bad rows placed at random and in every lane of the 8- and 16-row blocks (every
residue mod 16), on steady_state, observables and jacobian. Values of
recomputed rows are checked against an mpmath LU solve at 50 digits
(tests/schemes.py, an outside reference).
"""

from __future__ import annotations

import pickle

import numpy as np
import pytest

from treeflux.compiler.parse import load
from treeflux.compiler.pipeline import compile_scheme
from treeflux.runtime import cache
from treeflux.runtime import kernel as kernel_module
from treeflux.runtime.errors import EvaluationError
from treeflux.runtime.model import CompiledModel
from treeflux.runtime.kernel import BAD_SYMBOL, NOT_FINITE, NOT_PROBABILITY, Kernel

from .schemes import mp_steady_state

BACKENDS = ("python", "c", "cython", "llvm")
N = 10_003          # not a multiple of 8: the last block is padded
LANE_BASE = 4_096   # rows LANE_BASE + k, k = 0..15, cover every lane residue mod 16

MODEL = """\
name = "inhibited enzyme"
[parameters]
k1 = { value = 2.0 }
km1 = { value = 1.0 }
k2 = { value = 3.0 }
km2 = { value = 0.5 }
k3 = { value = 1.5 }
ki = { value = 4.0 }
kmi = { value = 0.25 }
[inputs]
c = { value = 1.0 }
i = { value = 0.5 }
[[edges]]
source = "E"
target = "ES"
rate = "k1*c"
[[edges]]
source = "ES"
target = "E"
rate = "km1"
[[edges]]
source = "ES"
target = "EP"
rate = "k2"
[[edges]]
source = "EP"
target = "ES"
rate = "km2"
[[edges]]
source = "EP"
target = "E"
rate = "k3"
[[edges]]
source = "E"
target = "EI"
rate = "ki*i"
[[edges]]
source = "EI"
target = "E"
rate = "kmi"
[observables]
bound = { "ES" = 1.0, "EP" = 1.0 }
velocity = { "EP" = "k3" }
"""


@pytest.fixture(scope="module")
def model_file(tmp_path_factory):
    path = tmp_path_factory.mktemp("fused") / "inhibited.toml"
    path.write_text(MODEL)
    return path


_MODELS: dict = {}


def model(model_file, backend):
    if backend not in _MODELS:
        _MODELS[backend] = compile_scheme(load(model_file), backend=backend, jacobian=True)
    return _MODELS[backend]


def batch(m, seed=0, n=N):
    """Rates log-uniform over [1e-3, 1e3] in model symbol order."""
    rng = np.random.default_rng(seed)
    return 10.0 ** rng.uniform(-3, 3, size=(n, len(m.symbols)))


def bad_rows(n=N, seed=1):
    """Every lane residue mod 16, random positions, and the rows of the padded tail."""
    rng = np.random.default_rng(seed)
    rows = set(range(LANE_BASE, LANE_BASE + 16)) | set(rng.choice(n, 16, replace=False).tolist())
    rows |= {n - 1, n - 2, n - 3, 0}
    return np.array(sorted(rows))


def plant(m, X, rows, kind):
    """Put a value of ``kind`` into ``rows`` (a copy of X)."""
    X = X.copy()
    sym = {s: j for j, s in enumerate(m.symbols)}
    for t, r in enumerate(rows):
        if kind == "spread":       # outside the straight-line range: recomputed
            X[r, sym["k1"]], X[r, sym["kmi"]] = (1e-200, 1e200) if t % 2 else (1e200, 1e-200)
        elif kind == "zero c":     # absent edge: solved on the positive subgraph
            X[r, sym["c"]] = 0.0
        elif kind == "zero i":
            X[r, sym["i"]] = 0.0
        else:
            raise ValueError(kind)
    return X


def old_path(m):
    """The same model (same kernels) with the checks as separate numpy passes."""
    clone = CompiledModel(m.info, m.kernel, m.label_kernel)
    clone._use_fused = False
    return clone


def same_bits(a, b):
    assert a.shape == b.shape and a.dtype == b.dtype
    assert np.array_equal(a.view(np.uint64), b.view(np.uint64))


# ------------------------------------------------------------------ kernel status

@pytest.mark.parametrize("backend", BACKENDS)
def test_kernel_status_codes_in_every_lane(model_file, backend):
    m = model(model_file, backend)
    sym = {s: j for j, s in enumerate(m.symbols)}
    X = batch(m, n=2_003)
    cases = [("k1", np.nan, BAD_SYMBOL), ("k2", np.inf, BAD_SYMBOL), ("km1", -np.inf, BAD_SYMBOL),
             ("k3", 0.0, BAD_SYMBOL), ("ki", -1.0, BAD_SYMBOL), ("c", -1e-300, BAD_SYMBOL),
             ("c", 0.0, NOT_PROBABILITY), ("i", 0.0, NOT_PROBABILITY), ("k1", 1e-200, NOT_PROBABILITY)]
    expect = np.zeros(len(X), dtype=np.uint8)
    for t, (name, value, bit) in enumerate(cases):
        for lane in range(16):
            r = 64 * t + lane * 3 + (lane % 8)  # every residue mod 8 and mod 16 over the lanes
            X[r, sym[name]] = value
            expect[r] = bit
    X[len(X) - 1, sym["k2"]] = np.nan       # a bad symbol in the padded tail block
    expect[-1] = BAD_SYMBOL
    out = np.empty((len(X), m.kernel.n_outputs))
    status = np.full(len(X), 255, dtype=np.uint8)
    count = m.kernel.check(X, out, status, 1)
    assert count == np.count_nonzero(status)
    # a bad symbol also breaks the row sum (NaN, or a guard that fails): only bit 1 is promised
    assert np.array_equal(status != 0, expect != 0)
    assert np.array_equal(status & BAD_SYMBOL, expect & BAD_SYMBOL)
    assert np.all(status[expect == NOT_PROBABILITY] & NOT_PROBABILITY)
    # every row is written: the unflagged rows are the raw kernel's
    good = np.flatnonzero(status == 0)
    raw = m.kernel(X[good])
    same_bits(out[good], raw)


@pytest.mark.parametrize("backend", BACKENDS)
def test_observables_not_finite_flag(model_file, backend):
    """NOT_FINITE marks exactly the rows whose observables are not finite."""
    m = model(model_file, backend)
    X = plant(m, batch(m, n=2_000), np.arange(0, 2_000, 37), "zero c")
    X = plant(m, X, np.arange(5, 2_000, 41), "spread")
    out = np.empty((len(X), m.kernel.n_outputs))
    status = np.zeros(len(X), dtype=np.uint8)
    m.kernel.check(X, out, status, 1)
    a, b = m.info.groups["obs"]
    broken = ~np.isfinite(out[:, a:b]).all(axis=1)
    assert broken.any()
    assert np.array_equal((status & NOT_FINITE) != 0, broken)


# ------------------------------------------------------------------ same bits, same refusals

@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("kind", ["spread", "zero c", "zero i"])
def test_recomputed_rows_same_bits_as_before(model_file, backend, kind):
    m = model(model_file, backend)
    old = old_path(m)
    rows = bad_rows()
    X = plant(m, batch(m), rows, kind)
    P = m.steady_state(X)
    same_bits(P, old.steady_state(X))
    O = m.observables(X)
    same_bits(O, old.observables(X))
    # flagged rows really took the safe path: they match mpmath (50 digits) and the looped solve
    edges = m.info.edges
    labels = m.labels(X[rows[:6]])
    for r, rates in zip(rows[:6], labels):
        keep = rates > 0
        ref = mp_steady_state(len(m.states), [e for e, k in zip(edges, keep) if k], rates[keep], dps=800)
        np.testing.assert_allclose(P[r], ref, rtol=1e-12, atol=1e-300)
    same_bits(P[rows], m._numeric(X[rows], rows))


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("kind", ["spread", "zero c"])
def test_jacobian_same_bits_as_before(model_file, backend, kind):
    m = model(model_file, backend)
    old = old_path(m)
    X = plant(m, batch(m, seed=3), np.arange(LANE_BASE, LANE_BASE + 16)[::3], kind)
    same_bits(m.jacobian(X), old.jacobian(X))


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("value, symbol, fragment", [
    (np.nan, "k2", "is not finite (nan)"),
    (np.inf, "kmi", "is not finite (inf)"),
    (-np.inf, "c", "is not finite (-inf)"),
    (0.0, "k1", "parameter 'k1' must be positive, got 0.0"),
    (-2.5, "km2", "parameter 'km2' must be positive, got -2.5"),
    (-1e-300, "i", "input 'i' must be non-negative, got -1e-300"),
])
def test_refusals_same_message_in_every_lane(model_file, backend, value, symbol, fragment):
    m = model(model_file, backend)
    old = old_path(m)
    j = m.symbols.index(symbol)
    X0 = batch(m, seed=5)
    for r in [LANE_BASE + k for k in range(16)] + [N - 1]:
        X = X0.copy()
        X[r, j] = value
        for call in ("steady_state", "observables", "jacobian"):
            with pytest.raises(EvaluationError) as new_err:
                getattr(m, call)(X)
            with pytest.raises(EvaluationError) as old_err:
                getattr(old, call)(X)
            assert str(new_err.value) == str(old_err.value)
        text = str(new_err.value)
        assert f"row {r}:" in text and fragment in text and "inhibited.toml" in text
        assert "\n" not in text and "np.float64" not in text


@pytest.mark.parametrize("backend", ["python", "llvm"])
def test_several_bad_rows_name_the_same_first_one(model_file, backend):
    """The first bad entry (row-major, non-finite before floors) is named, as before."""
    m = model(model_file, backend)
    old = old_path(m)
    X = batch(m, seed=6)
    X[7000, m.symbols.index("k3")] = -1.0
    X[9000, m.symbols.index("k1")] = np.nan
    X[8000, m.symbols.index("c")] = -3.0
    msgs = []
    for mm in (m, old):
        with pytest.raises(EvaluationError) as err:
            mm.steady_state(X)
        msgs.append(str(err.value))
    assert msgs[0] == msgs[1] and "row 9000" in msgs[0]


def test_zero_rate_refusal_same_message(tmp_path):
    """A zero that leaves two terminal components is refused as before (lean path)."""
    path = tmp_path / "split.toml"
    path.write_text('name = "split"\n[parameters]\na = { value = 1.0 }\nb = { value = 1.0 }\n'
                    '[inputs]\nc = { value = 1.0 }\n'
                    '[[edges]]\nsource = "A"\ntarget = "B"\nrate = "a"\n'
                    '[[edges]]\nsource = "B"\ntarget = "A"\nrate = "b*c"\n'
                    '[[edges]]\nsource = "A"\ntarget = "C"\nrate = "a"\n'
                    '[[edges]]\nsource = "C"\ntarget = "A"\nrate = "b*c"\n')
    m = compile_scheme(load(path), backend="llvm")
    X = np.ones((5000, 3))
    X[4321, 2] = 0.0
    msgs = []
    for mm in (m, old_path(m)):
        with pytest.raises(EvaluationError) as err:
            mm.steady_state(X)
        msgs.append(str(err.value))
    assert msgs[0] == msgs[1] and "row 4321" in msgs[0] and "terminal components" in msgs[0]


# ------------------------------------------------------------------ threads, out=, inputs

@pytest.mark.parametrize("backend", BACKENDS)
def test_threads_agree_bit_for_bit(model_file, backend):
    m = model(model_file, backend)
    X = plant(m, batch(m, seed=8, n=20_011), bad_rows(20_011), "spread")
    X = plant(m, X, bad_rows(20_011, seed=9), "zero c")
    one = m.steady_state(X, threads=1)
    same_bits(m.steady_state(X, threads=2), one)
    same_bits(m.steady_state(X), one)
    same_bits(m.observables(X, threads=2), m.observables(X, threads=1))
    same_bits(m.jacobian(X[:4_000], threads=2), m.jacobian(X[:4_000], threads=1))


@pytest.mark.parametrize("backend", ["c", "llvm"])
def test_out_written_in_place_and_inputs_of_every_form(model_file, backend):
    m = model(model_file, backend)
    X = plant(m, batch(m, seed=10), bad_rows(), "zero i")
    ref = m.steady_state(X)
    out = np.full((N, len(m.states)), -1.0)
    assert m.steady_state(X, out=out) is out
    same_bits(out, ref)
    # conversions keep working: Fortran order, float32-exact integers, lists, dicts
    same_bits(m.steady_state(np.asfortranarray(X)), ref)
    same_bits(m.steady_state(X.tolist()[:50]), ref[:50])
    cols = {s: X[:, j] for j, s in enumerate(m.symbols)}
    same_bits(m.steady_state(cols), ref)
    Xi = np.rint(X[:100] * 1000 + 1).astype(np.int64)
    same_bits(m.steady_state(Xi), m.steady_state(Xi.astype(np.float64)))


def test_basis_same_bits(tmp_path):
    """Several terminal components: one probability block per component."""
    path = tmp_path / "two.toml"
    path.write_text('name = "two"\n[parameters]\na = { value = 1.0 }\nb = { value = 2.0 }\n'
                    'c = { value = 3.0 }\n'
                    '[[edges]]\nsource = "A"\ntarget = "B"\nrate = "a"\n'
                    '[[edges]]\nsource = "B"\ntarget = "A"\nrate = "b"\n'
                    '[[edges]]\nsource = "T"\ntarget = "A"\nrate = "c"\n'
                    '[[edges]]\nsource = "T"\ntarget = "C"\nrate = "c"\n'
                    '[[edges]]\nsource = "C"\ntarget = "D"\nrate = "a"\n'
                    '[[edges]]\nsource = "D"\ntarget = "C"\nrate = "b"\n')
    for backend in ("python", "llvm"):
        m = compile_scheme(load(path), backend=backend)
        X = 10.0 ** np.random.default_rng(2).uniform(-3, 3, size=(N, 3))
        X[LANE_BASE:LANE_BASE + 16:2, 0] = 1e-250
        same_bits(m.basis(X), old_path(m).basis(X))
        X[LANE_BASE + 5, 1] = np.nan
        msgs = []
        for mm in (m, old_path(m)):
            with pytest.raises(EvaluationError) as err:
                mm.basis(X)
            msgs.append(str(err.value))
        assert msgs[0] == msgs[1] and f"row {LANE_BASE + 5}" in msgs[0]


def test_input_derivatives_refusal_same_message(model_file):
    m = compile_scheme(load(model_file), backend="llvm", input_derivatives="c")
    X = batch(m, seed=11)
    same_bits(m.input_derivatives(X)[0], old_path(m).input_derivatives(X)[0])
    X[LANE_BASE + 3, m.symbols.index("k1")] = 1e-250
    msgs = []
    for mm in (m, old_path(m)):
        with pytest.raises(EvaluationError) as err:
            mm.input_derivatives(X)
        msgs.append(str(err.value))
    assert msgs[0] == msgs[1] and f"row {LANE_BASE + 3}" in msgs[0]


# ------------------------------------------------------------------ rules around the kernels

def test_thread_rule_learns_when_a_split_pays(monkeypatch):
    """Default threads: one until one thread's time per row is known, then the
    split once, then the split only if it was faster, retried now and then
    (see runtime/kernel.py).
    The core count is pinned to 2 so the rule is tested on any machine."""
    monkeypatch.setattr(kernel_module, "_CORES", 2)
    k = Kernel(lambda X, out, a, b: 0, 3, 2, backend="python-test")
    n = 200_000
    assert k.threads_for(n) == 1                       # nothing measured yet
    k.seconds_per_row[1] = 30e-9
    assert k.threads_for(n) == 2                       # try the split once
    k.seconds_per_row[2] = 29e-9                       # not 10% faster: stay on one ...
    picks = [k.threads_for(n) for _ in range(3 * kernel_module.RETRY_SPLIT)]
    # ... but try the split again every RETRY_SPLIT-th call (its first try may
    # have paid for starting the pool's threads)
    assert picks.count(2) == 3 and picks[kernel_module.RETRY_SPLIT - 1] == 2
    assert picks[:kernel_module.RETRY_SPLIT - 1] == [1] * (kernel_module.RETRY_SPLIT - 1)
    k.seconds_per_row[2] = 16e-9
    assert k.threads_for(n) == 2
    assert k.threads_for(1_024) == 1                   # small calls never split
    assert k.threads_for(n, 1) == 1 and k.threads_for(n, 2) == 2
    k.seconds_per_row[1] = 1e-12                       # 0.2 ms of work at most: not worth a thread
    assert k.threads_for(n) == 1
    # calls record their own times
    fresh = Kernel(lambda X, out, a, b: 0, 3, 2, backend="python-test")
    fresh(np.ones((10_000, 3)), threads=2)
    fresh(np.ones((10_000, 3)), threads=1)
    assert set(fresh.seconds_per_row) == {1, 2}


def test_cache_keys_carry_the_kernel_abi(monkeypatch):
    """An entry built for another kernel ABI is never found (so never loaded)."""
    key = cache.make_key("model", "text")
    monkeypatch.setattr(cache, "KERNEL_ABI", cache.KERNEL_ABI - 1)
    assert cache.make_key("model", "text") != key


@pytest.mark.parametrize("backend", BACKENDS)
def test_pickled_models_keep_the_fused_path(model_file, backend):
    m = model(model_file, backend)
    clone = pickle.loads(pickle.dumps(m))
    assert clone._fused and clone.kernel.checked is not None
    X = plant(m, batch(m, seed=12, n=300), [3, 100, 299], "spread")
    same_bits(clone.steady_state(X), m.steady_state(X))


@pytest.mark.parametrize("backend", ["c", "llvm"])
def test_scheme_without_symbols(backend):
    """No symbol columns (an (N, 0) array): nothing to check, nothing to address.
    Balance 2·p_A = 1·p_B gives p = (1/3, 2/3) exactly (by hand)."""
    from treeflux.compiler import Scheme

    s = Scheme()
    s.add_edge("A", "B", "2")
    s.add_edge("B", "A", "1")
    m = compile_scheme(s, backend=backend)
    P = m.steady_state(np.zeros((5_000, 0)))
    np.testing.assert_allclose(P, np.tile([1 / 3, 2 / 3], (5_000, 1)), rtol=1e-15)
