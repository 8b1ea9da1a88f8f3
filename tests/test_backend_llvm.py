"""Tests of the LLVM back end (compiler/backends/llvm.py).

References used below:
- ``ir.evaluate(..., "numpy")``: the IR's own definition of every op in
  float64; add/mul/div/sub/neg/max/sqrt must agree bit for bit (same left-to-
  right folds, no fast-math flags).
- mpmath at 50 digits (``ir.mpmath_domain`` and direct linear solves of the
  master equation): the exact values, to 1e-14 relative.
- Briggs & Haldane, Biochem. J. 19 (1925) 338: fraction of bound enzyme
  ES/(E+ES) = S/(S + K_M) with K_M = (k₋₁ + k₂)/k₁.
"""

import itertools
import pickle
import random
from fractions import Fraction

import mpmath
import numpy as np
import pytest

from treeflux.compiler import ir
from treeflux.compiler.backends import llvm as backend
from treeflux.compiler.errors import TooLargeError
from treeflux.runtime.errors import EvaluationError

MP = ir.mpmath_domain(50)


def loguniform(rng, shape, lo=1e-3, hi=1e3):
    return np.exp(rng.uniform(np.log(lo), np.log(hi), shape))


def numpy_reference(fn, X):
    cols = [X[:, j] for j in range(fn.n_inputs)]
    vals = ir.evaluate(fn, fn.outputs, cols, "numpy")
    return np.column_stack([np.broadcast_to(np.asarray(v, dtype=float), (X.shape[0],)) for v in vals])


def mpmath_reference(fn, X):
    out = np.empty((X.shape[0], len(fn.outputs)))
    for r in range(X.shape[0]):
        vals = ir.evaluate(fn, fn.outputs, [MP.table["const"](Fraction(float(x))) for x in X[r]], MP)
        out[r] = [float(v) for v in vals]
    return out


def rel_err(a, b):
    return float(np.max(np.abs(a - b) / np.abs(b)))


# ------------------------------------------------------------------ schemes by hand

def rooted_tree_sums(g, n, rate):
    """ρ_i = Σ over spanning trees rooted at i of the product of their labels
    (Matrix-Tree theorem; Tutte 1948). Brute force: every non-root state picks
    one out-edge; keep the choices without cycles. ``rate`` maps (i, j) → node."""
    rho = []
    for root in range(n):
        others = [v for v in range(n) if v != root]
        options = [[j for (i, j) in rate if i == v] for v in others]
        terms = []
        for pick in itertools.product(*options):
            parent = dict(zip(others, pick))
            ok = True
            for v in others:  # follow parents: must reach the root within n steps
                u, steps = v, 0
                while u != root and steps <= n:
                    u, steps = parent[u], steps + 1
                ok &= u == root
            if ok:
                terms.append(g.mul(*[rate[(v, parent[v])] for v in others]))
        rho.append(g.add(*terms) if len(terms) > 1 else terms[0])
    return rho


def steady_state_function(n, edges):
    """p_i = ρ_i / Σρ with one input column per edge label."""
    g = ir.Graph()
    rate = {e: g.input(k) for k, e in enumerate(edges)}
    rho = rooted_tree_sums(g, n, rate)
    total = g.add(*rho)
    return ir.compact(ir.Function(g, len(edges), [g.div(r, total) for r in rho]))


def master_equation_solution(n, edges, rates):
    """Steady state of dp/dt = L p solved at 50 digits with mpmath (independent
    of the tree formula): L p = 0 with the last equation replaced by Σp = 1."""
    mp = mpmath.mp.clone() if hasattr(mpmath.mp, "clone") else mpmath.mp
    mp.dps = 50
    L = mp.zeros(n, n)
    for (i, j), k in zip(edges, rates):
        k = mp.mpf(float(k))
        L[j, i] += k
        L[i, i] -= k
    for c in range(n):
        L[n - 1, c] = 1
    b = mp.zeros(n, 1)
    b[n - 1] = 1
    return [float(v) for v in mp.lu_solve(L, b)]


SCHEMES = {
    "cycle3": (3, [(0, 1), (1, 0), (1, 2), (2, 1), (2, 0), (0, 2)]),
    "one_way_cycle3": (3, [(0, 1), (1, 2), (2, 0), (1, 0)]),
    "square4": (4, [(0, 1), (1, 0), (1, 2), (2, 1), (2, 3), (3, 2), (3, 0), (0, 3), (0, 2)]),
    "complete4": (4, [(i, j) for i in range(4) for j in range(4) if i != j]),
}


@pytest.fixture(scope="module")
def kernels():
    return {name: (steady_state_function(n, e), backend.build(steady_state_function(n, e)))
            for name, (n, e) in SCHEMES.items()}


@pytest.mark.parametrize("name", sorted(SCHEMES))
def test_steady_state_matches_master_equation(kernels, name):
    n, edges = SCHEMES[name]
    fn, kern = kernels[name]
    rng = np.random.default_rng(1)
    X = loguniform(rng, (37, len(edges)), 1e-6, 1e6)  # stiff rates
    P = kern(X)
    ref = np.array([master_equation_solution(n, edges, row) for row in X])  # mpmath, 50 digits
    assert rel_err(P, ref) < 1e-14
    assert np.array_equal(P, numpy_reference(fn, X))  # same arithmetic as the IR definition
    assert np.allclose(P.sum(axis=1), 1.0, rtol=0, atol=1e-15)


@pytest.mark.parametrize("N", [1, 7, 8, 9, 15, 16, 17, 31, 32, 33, 1000])  # blocks of 16 rows
def test_tail_sizes(kernels, N):
    fn, kern = kernels["complete4"]
    X = loguniform(np.random.default_rng(N), (N, fn.n_inputs))
    assert np.array_equal(kern(X), numpy_reference(fn, X))


def test_row_ranges_touch_only_their_rows(kernels):
    fn, kern = kernels["square4"]
    X = loguniform(np.random.default_rng(3), (40, fn.n_inputs))
    out = np.full((40, len(fn.outputs)), -7.0)
    assert kern.run(X, out, 3, 22) == 0
    assert np.all(out[:3] == -7.0) and np.all(out[22:] == -7.0)
    assert np.array_equal(out[3:22], numpy_reference(fn, X[3:22]))
    assert kern.run(X, out, 5, 5) == 0  # empty range


# ------------------------------------------------------------------ every op

def single_op_function(op, n_in=2):
    g = ir.Graph()
    x = [g.input(j) for j in range(n_in)]
    outs = {
        "add": [g.add(x[0], x[1]), g.add(x[0], x[1], g.const(Fraction(1, 3)))],
        "mul": [g.mul(x[0], x[1]), g.mul(x[0], x[1], g.const(Fraction(-2, 7)))],
        "div": [g.div(x[0], x[1]), g.div(g.const(1), x[1])],
        "sub": [g.sub(x[0], x[1])],
        "neg": [g.neg(x[0])],
        "pow": [g.pow(x[0], x[1])] + [g.pow(x[0], g.const(e)) for e in (-4, -3, -1, 0, 1, 2, 3, 4, 5)]
               + [g.pow(x[0], g.const(Fraction(1, 2))), g.pow(x[0], g.const(Fraction(-3, 2)))],
        "exp": [g.exp(x[0]), g.exp(g.neg(x[1]))],
        "log": [g.log(x[0]), g.log(x[1])],
        "sqrt": [g.sqrt(x[0])],
        "max": [g.max(x[0], x[1]), g.max(x[0], g.const(3), x[1])],
    }[op]
    return ir.compact(ir.Function(g, n_in, outs))


@pytest.mark.parametrize("op", ["add", "mul", "div", "sub", "neg", "pow", "exp", "log", "sqrt", "max"])
def test_every_op_against_mpmath(op):
    fn = single_op_function(op)
    rng = np.random.default_rng(11)
    X = loguniform(rng, (203, 2), 1e-2, 1e2)
    if op == "exp":
        X = rng.uniform(-30, 30, (203, 2))
    Y = backend.build(fn)(X)
    assert rel_err(Y, mpmath_reference(fn, X)) < 1e-14  # mpmath, 50 digits
    ref = numpy_reference(fn, X)
    if op in ("add", "mul", "div", "sub", "neg", "sqrt", "max"):
        assert np.array_equal(Y, ref)
    else:
        assert rel_err(Y, ref) < 1e-14


def test_max_propagates_nan_like_numpy():
    fn = single_op_function("max")
    X = np.array([[1.0, np.nan], [np.nan, 2.0], [4.0, 5.0]])
    Y = backend.build(fn)(X)
    assert np.array_equal(np.isnan(Y), np.isnan(numpy_reference(fn, X)))
    assert Y[2].tolist() == [5.0, 5.0]


@pytest.mark.parametrize("width", [2, 3, 5, 24])
def test_max_folds_like_numpy_on_every_special_value(width):
    """The folded max (one vmaxpd per operand, one NaN test per pair) against
    numpy's maximum folded left to right, on rows drawn from ±0, ±inf, NaN,
    and ordinary values in every lane: the same bits (signed zeros and ties
    included), NaN exactly where numpy gives NaN."""
    g = ir.Graph()
    xs = [g.input(j) for j in range(width)]
    fn = ir.compact(ir.Function(g, width, [g.max(*xs), g.max(*reversed(xs))]))
    specials = np.array([0.0, -0.0, np.inf, -np.inf, np.nan, 1.5, -2.5, 1.5, 5e-324])
    rng = np.random.default_rng(width)
    X = specials[rng.integers(0, len(specials), (1_000, width))]
    Y = backend.build(fn)(X)
    ref = numpy_reference(fn, X)
    nan = np.isnan(ref)
    assert np.array_equal(np.isnan(Y), nan) and nan.any() and (~nan).any()
    assert np.array_equal(Y[~nan].view(np.int64), ref[~nan].view(np.int64))


# ------------------------------------------------------------------ random DAGs

def random_positive_function(seed, n_in, n_rows, n_out):
    """A random subtraction-free DAG over positive inputs (add, mul, div, max, sqrt),
    built from means so that values stay within the range of the inputs."""
    rnd = random.Random(seed)
    g = ir.Graph()
    pool = [g.input(j) for j in range(n_in)] + [g.const(Fraction(rnd.randint(1, 9), rnd.randint(1, 9)))]
    while len(g) < n_rows:
        kind = rnd.choice(["mean", "geometric", "harmonic", "max", "fraction"])
        recent = pool[-12:] if rnd.random() < 0.7 else pool
        xs = rnd.sample(recent, min(len(recent), rnd.randint(2, 4)))
        a, b = xs[0], xs[1]
        if kind == "mean":
            node = g.mul(g.add(*xs), g.const(Fraction(1, len(xs))))
        elif kind == "geometric":
            node = g.sqrt(g.mul(a, b))
        elif kind == "harmonic":
            node = g.div(g.mul(a, b), g.add(a, b))
        elif kind == "max":
            node = g.max(*xs)
        else:
            node = g.div(a, g.add(a, b))
        pool.append(node)
    return ir.compact(ir.Function(g, n_in, pool[-n_out:]))


@pytest.mark.parametrize("seed,n_in,n_out", [(0, 1, 1), (1, 8, 8), (2, 13, 3), (3, 16, 17), (4, 24, 9)])
def test_random_dags(seed, n_in, n_out):
    fn = random_positive_function(seed, n_in, 150, n_out)
    rng = np.random.default_rng(seed)
    X = loguniform(rng, (61, n_in), 1e-2, 1e2)
    Y = backend.build(fn)(X)
    assert np.array_equal(Y, numpy_reference(fn, X))
    assert rel_err(Y[:20], mpmath_reference(fn, X[:20])) < 1e-14  # mpmath, 50 digits


def test_chunked_bodies_agree(monkeypatch):
    """Tiny chunks force values through the temporaries array and slot reuse."""
    fn = random_positive_function(7, 10, 400, 11)
    X = loguniform(np.random.default_rng(7), (29, 10), 1e-2, 1e2)
    whole = backend.build(fn)(X)
    monkeypatch.setattr(backend, "CHUNK_ROWS", 7)
    chunks, slot, n_slots = backend._plan(fn)
    assert len(chunks) > 40 and 0 < n_slots < len(slot)  # slots are reused
    text = backend.emit(fn, name="m")["m.ll"]
    assert "@tf_part40" in text
    assert np.array_equal(backend.compile_text(text, 10, 11)(X), whole)


def test_outputs_may_be_inputs_or_constants():
    g = ir.Graph()
    a, b = g.input(0), g.input(1)
    fn = ir.compact(ir.Function(g, 2, [b, g.const(Fraction(2, 3)), g.add(a, b), a, b]))
    X = loguniform(np.random.default_rng(0), (11, 2))
    Y = backend.build(fn)(X)
    assert np.array_equal(Y[:, 0], X[:, 1]) and np.array_equal(Y[:, 3], X[:, 0])
    assert np.all(Y[:, 1] == 2 / 3)
    assert np.array_equal(Y[:, 2], X[:, 0] + X[:, 1])


def test_constant_function_without_inputs():
    g = ir.Graph()
    fn = ir.compact(ir.Function(g, 0, [g.add(g.const(1), g.const(Fraction(1, 2)))]))
    Y = backend.build(fn)(np.empty((10, 0)))
    assert np.all(Y == 1.5)


# ------------------------------------------------------------------ text, pickling, threads

def test_emit_is_deterministic_valid_and_free_of_names():
    import llvmlite.binding as llvm

    n, edges = SCHEMES["complete4"]
    a = backend.emit(steady_state_function(n, edges), name="user_model_xyz")
    b = backend.emit(steady_state_function(n, edges), name="user_model_xyz")
    assert list(a) == ["user_model_xyz.ll"] and a == b
    text = a["user_model_xyz.ll"]
    assert "user_model_xyz" not in text
    backend._llvm()
    for check in (False, True):
        mod = llvm.parse_assembly(backend.emit(steady_state_function(n, edges), name="m",
                                               check_inputs=check)["m.ll"])
        mod.verify()
        assert mod.get_function(backend.ENTRY).name == backend.ENTRY


def test_pickle_round_trip(kernels):
    fn, kern = kernels["cycle3"]
    again = pickle.loads(pickle.dumps(kern))
    X = loguniform(np.random.default_rng(5), (100, fn.n_inputs))
    assert again.backend == "llvm"
    assert np.array_equal(again(X), kern(X))


def test_two_threads_equal_one(kernels):
    fn, kern = kernels["complete4"]
    X = loguniform(np.random.default_rng(9), (20_003, fn.n_inputs))
    assert np.array_equal(kern(X, threads=2), kern(X, threads=1))


# ------------------------------------------------------------------ refusals

def test_check_inputs_refuses_first_bad_row():
    n, edges = SCHEMES["cycle3"]
    fn = steady_state_function(n, edges)
    kern = backend.build(fn, check_inputs=True)
    X = loguniform(np.random.default_rng(2), (21, fn.n_inputs))
    assert np.array_equal(kern(X), numpy_reference(fn, X))
    for row, bad in [(0, 0.0), (9, -1.0), (13, np.nan), (19, np.inf), (20, -0.0)]:
        Y = X.copy()
        Y[row, 4] = bad
        Y[row + 1:, 2] = -5.0  # later bad rows must not hide the first
        with pytest.raises(EvaluationError, match=f"row {row}:"):
            kern(Y)
    Xn = X.copy()
    Xn[3] *= -1.0  # without the check, the kernel just computes
    assert np.array_equal(backend.build(fn)(Xn), numpy_reference(fn, Xn), equal_nan=True)


def test_refusals():
    with pytest.raises(ValueError, match="unknown op 'tan'"):
        g = ir.Graph()
        x = g.input(0)
        g.node("tan", (x,))
        backend.emit(ir.Function(g, 1, [1]), name="m")
    fn = random_positive_function(1, 3, 60, 2)
    with pytest.raises(ValueError, match="file stem"):
        backend.emit(fn, name="../evil")
    rows = sum(op not in ("const", "input") for op in fn.graph.ops)
    old = backend.MAX_ROWS
    try:
        backend.MAX_ROWS = rows - 1
        with pytest.raises(TooLargeError, match=f"{rows} operation rows"):
            backend.build(fn)
    finally:
        backend.MAX_ROWS = old


# ------------------------------------------------------------------ through the front end

def test_briggs_haldane_through_trees_front_end():
    from treeflux.compiler import Scheme
    from treeflux.compiler.frontend import build as lower

    s = Scheme()
    s.add_edge("E", "ES", "k1*S")
    s.add_edge("ES", "E", "km1 + k2")  # unbinding and product release both return E
    fn, _ = lower(s, method="trees")
    fn = ir.compact(ir.Function(fn.graph, fn.n_inputs, fn.group("p")))
    kern = backend.build(fn)
    rng = np.random.default_rng(4)
    X = loguniform(rng, (1001, 4), 1e-4, 1e4)
    cols = dict(zip(s.symbols, X.T))
    P = kern(X)
    km = (cols["km1"] + cols["k2"]) / cols["k1"]
    bound = cols["S"] / (cols["S"] + km)  # Briggs & Haldane, Biochem. J. 19 (1925) 338
    assert rel_err(P[:, s.states.index("ES")], bound) < 1e-14
    assert rel_err(P[:, s.states.index("E")], km / (cols["S"] + km)) < 1e-14
