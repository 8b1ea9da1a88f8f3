"""Tests of the C back end (compiler/backends/c.py).

References: the IR's own evaluators (``ir.evaluate`` in the numpy domain and
in 50-digit mpmath, the living definition of every op), the master equation
(a steady state balances inflow and outflow at every state: DESIGN.md), and
the Briggs–Haldane closed form. The emitted C is fed to the real compiler.

The helpers at the top are shared with tests/test_backend_cython.py.
"""

from __future__ import annotations

import hashlib
import json
import pickle
import shutil
import subprocess
import sys
from fractions import Fraction

import mpmath
import numpy as np
import pytest

from treeflux.compiler import ir
from treeflux.compiler.backends import c as cback
from treeflux.runtime.errors import EvaluationError

# ------------------------------------------------------------------ hand-built functions

THREE = [(0, 1), (1, 0), (1, 2), (2, 1), (2, 0), (0, 2)]  # A⇌B, B⇌C, C⇌A


def three_state(g: ir.Graph, labels) -> list[int]:
    """ρ_i of the 3-state cycle by the Matrix-Tree theorem (Kirchhoff; Tutte's
    directed form): the three spanning trees rooted at i are {j→i, k→i},
    {j→i, k→j} and {k→i, j→k}."""
    lab = dict(zip(THREE, labels))
    rho = []
    for i in range(3):
        j, k = [s for s in range(3) if s != i]
        rho.append(g.add(g.mul(lab[j, i], lab[k, i]), g.mul(lab[j, i], lab[k, j]),
                         g.mul(lab[k, i], lab[j, k])))
    return rho


def hypercube(d: int):
    n = 2 ** d
    return n, [(i, i ^ (1 << b)) for i in range(n) for b in range(d)]


def eliminate(g: ir.Graph, n: int, edges, labels) -> list[int]:
    """x_i = ρ_i/ρ_{n-1} by subtraction-free state reduction (Grassmann, Taksar
    & Heyman, Oper. Res. 33 (1985) 1107), eliminating states 0..n-2 in order."""
    out = [dict() for _ in range(n)]
    inn = [dict() for _ in range(n)]
    for (i, j), lab in zip(edges, labels):
        out[i][j] = lab
        inn[j][i] = lab
    saved = []
    for k in range(n - 1):
        tg, src = sorted(out[k]), sorted(inn[k])
        d = g.add(*[out[k][j] for j in tg])
        saved.append((k, d, [(i, inn[k][i]) for i in src]))
        for i in src:
            t = g.div(inn[k][i], d)
            for j in tg:
                if j != i:
                    via = g.mul(t, out[k][j])
                    new = via if j not in out[i] else g.add(out[i][j], via)
                    out[i][j] = inn[j][i] = new
        for i in src:
            del out[i][k]
        for j in tg:
            del inn[j][k]
    one = g.const(1)
    x = [None] * n
    x[n - 1] = one
    for k, d, ins in reversed(saved):
        terms = [q if x[i] == one else g.mul(x[i], q) for i, q in ins]
        x[k] = g.div(g.add(*terms), d)
    return x


def normalized(g: ir.Graph, rho) -> list[int]:
    total = g.add(*rho)
    return [g.div(r, total) for r in rho]


def steady_function(kind: str) -> ir.Function:
    """p of the 3-state cycle (``"three"``) or of the 4-state ring Q2 / the
    8-state cube Q3 by elimination (``"q2"``, ``"q3"``); one input per edge."""
    g = ir.Graph()
    if kind == "three":
        labels = [g.input(j) for j in range(len(THREE))]
        p = normalized(g, three_state(g, labels))
        n_in = len(THREE)
    else:
        n, edges = hypercube({"q2": 2, "q3": 3}[kind])
        labels = [g.input(j) for j in range(len(edges))]
        p = normalized(g, eliminate(g, n, edges, labels))
        n_in = len(edges)
    fn = ir.Function(g, n_in, [])
    fn.add_group("p", p)
    return ir.compact(fn)


def edges_of(kind: str):
    return THREE if kind == "three" else hypercube({"q2": 2, "q3": 3}[kind])[1]


def op_zoo() -> ir.Function:
    """Every op of the IR once or more, on inputs a, b, c (positive)."""
    g = ir.Graph()
    a, b, c = g.input(0), g.input(1), g.input(2)
    k = lambda v: g.const(Fraction(v))  # noqa: E731
    outs = [
        g.add(a, b, c), g.mul(a, b, c), g.div(a, b), g.sub(a, b), g.neg(c),
        g.pow(a, k(2)), g.pow(a, k(3)), g.pow(b, k(-2)), g.pow(c, k(0)), g.pow(a, k(7)),
        g.pow(b, k(-5)), g.pow(c, k(65)), g.pow(a, k(Fraction(1, 2))),
        g.pow(b, k(Fraction(3, 2))), g.pow(a, b),
        g.exp(g.div(a, g.add(a, b))), g.log(a), g.log(g.add(a, k(1))), g.sqrt(b),
        g.max(a, b), g.max(c, a, b), g.mul(k(Fraction(-7, 3)), a), g.add(a, k(Fraction(1, 3))),
        g.sub(g.mul(a, a), g.mul(b, b)),
    ]
    fn = ir.Function(g, 3, [])
    fn.add_group("out", outs)
    return ir.compact(fn)


def random_dag(seed: int, *, n_inputs: int = 6, n_nodes: int = 40) -> ir.Function:
    """A random subtraction-free DAG whose values stay in (0, 1): every new
    node v = op(...) enters the pool as v/(1+v)."""
    rng = np.random.default_rng(seed)
    g = ir.Graph()
    one = g.const(1)
    pool = [g.input(j) for j in range(n_inputs)]
    for _ in range(n_nodes):
        pick = lambda m: [pool[i] for i in rng.choice(len(pool), size=m, replace=False)]  # noqa: E731
        kind = rng.integers(8)
        if kind == 0:
            v = g.add(*pick(int(rng.integers(2, 5))))
        elif kind == 1:
            v = g.mul(*pick(int(rng.integers(2, 4))))
        elif kind == 2:
            v = g.div(*pick(2))
        elif kind == 3:
            v = g.sqrt(pick(1)[0])
        elif kind == 4:
            v = g.max(*pick(int(rng.integers(2, 4))))
        elif kind == 5:
            v = g.pow(pick(1)[0], g.const(int(rng.choice([2, 3, 5, -2]))))
        elif kind == 6:
            v = g.exp(pick(1)[0])
        else:
            v = g.log(g.add(pick(1)[0], g.const(2)))
        pool.append(g.div(v, g.add(v, one)))
    fn = ir.Function(g, n_inputs, [])
    fn.add_group("out", pool[n_inputs:][-12:])
    return ir.compact(fn)


def stack(fns) -> ir.Function:
    """Several Functions side by side: inputs and outputs concatenated."""
    g = ir.Graph()
    outs, offset = [], 0
    for fn in fns:
        new = {}
        for i, (op, args, data) in enumerate(zip(fn.graph.ops, fn.graph.args, fn.graph.data)):
            if op == "input":
                new[i] = g.input(data + offset)
            else:
                new[i] = g.node(op, tuple(new[a] for a in args), data)
        outs += [new[o] for o in fn.outputs]
        offset += fn.n_inputs
    out = ir.Function(g, offset, [])
    out.add_group("out", outs)
    return ir.compact(out)


def log_uniform(rng, shape, lo=-3.0, hi=3.0):
    return 10.0 ** rng.uniform(lo, hi, shape)


def numpy_reference(fn: ir.Function, X: np.ndarray) -> np.ndarray:
    cols = ir.evaluate(fn, fn.outputs, list(X.T), "numpy")
    return np.column_stack([np.broadcast_to(np.asarray(v, float), X.shape[:1]) for v in cols])


def mpmath_reference(fn: ir.Function, X: np.ndarray) -> list[list]:
    """50-digit evaluation of the double inputs (mpmath at high precision)."""
    return [ir.evaluate(fn, fn.outputs, [mpmath.mpf(float(v)) for v in row], "mpmath")
            for row in X]


def assert_close_mp(got: np.ndarray, ref, rtol=1e-14):
    worst = 0.0
    for grow, rrow in zip(got, ref):
        for gv, rv in zip(grow, rrow):
            worst = max(worst, float(abs(mpmath.mpf(float(gv)) - rv) / abs(rv)))
    assert worst <= rtol, worst


def balance_residual(edges, X: np.ndarray, P: np.ndarray) -> float:
    """Largest relative imbalance of the master equation Σ_j ℓ(j→i) p_j =
    p_i Σ_k ℓ(i→k) (dp/dt = 0 at a steady state; DESIGN.md). Both sides are
    sums of positive terms, so the relative residual is at rounding level."""
    n = P.shape[1]
    inflow = np.zeros_like(P)
    outflow = np.zeros_like(P)
    for e, (i, j) in enumerate(edges):
        inflow[:, j] += X[:, e] * P[:, i]
        outflow[:, i] += X[:, e] * P[:, i]
    assert n == inflow.shape[1]
    return float(np.max(np.abs(inflow - outflow) / outflow))


def briggs_haldane():
    """E ⇌ ES → E with inputs (k1, S, km1, k2); returns (Function, index of ES).

    Through the trees front end when it imports, else the same tree sums by
    hand: ρ_E = k₋₁ + k₂, ρ_ES = k₁S (one spanning tree per root)."""
    try:
        from treeflux.compiler.frontend import build as lower
        from treeflux.compiler.model import Scheme
    except ImportError:
        lower = None
    if lower is not None:
        s = Scheme()
        s.add_edge("E", "ES", "k1*S")
        s.add_edge("ES", "E", "km1 + k2")
        assert s.symbols == ("k1", "S", "km1", "k2")
        fn, _ = lower(s, method="trees")
        fn = ir.compact(fn)
        fn = ir.Function(fn.graph, fn.n_inputs, fn.group("p"))
        return ir.compact(fn), s.states.index("ES")
    g = ir.Graph()
    k1, S, km1, k2 = (g.input(j) for j in range(4))
    p = normalized(g, [g.add(km1, k2), g.mul(k1, S)])
    fn = ir.Function(g, 4, [])
    fn.add_group("p", p)
    return ir.compact(fn), 1


# ------------------------------------------------------------------ tests

@pytest.fixture(scope="module")
def kernels():
    names = ("three", "q2", "q3")
    return {k: (steady_function(k), cback.build(steady_function(k), name=f"test_{k}")) for k in names}


@pytest.mark.parametrize("kind", ["three", "q2", "q3"])
def test_steady_state_agrees_with_reference_and_balances(kernels, kind):
    fn, kern = kernels[kind]
    rng = np.random.default_rng(11)
    X = log_uniform(rng, (61, fn.n_inputs))
    P = kern(X)
    np.testing.assert_allclose(P, numpy_reference(fn, X), rtol=1e-14, atol=0)
    assert_close_mp(P[:12], mpmath_reference(fn, X[:12]))
    np.testing.assert_allclose(P.sum(axis=1), 1.0, rtol=1e-14)
    assert balance_residual(edges_of(kind), X, P) < 1e-12


def test_every_op_against_mpmath():
    fn = op_zoo()
    kern = cback.build(fn, name="test_zoo")
    rng = np.random.default_rng(5)
    X = rng.uniform(0.5, 2.0, (21, 3))
    Y = kern(X)
    np.testing.assert_allclose(Y, numpy_reference(fn, X), rtol=1e-14, atol=0)
    ref = mpmath_reference(fn, X)
    # the last output a² − b² cancels: compare it in absolute terms of a²
    assert_close_mp(Y[:, :-1], [r[:-1] for r in ref])
    cancel = np.array([float(r[-1]) for r in ref])
    assert np.all(np.abs(Y[:, -1] - cancel) <= 1e-15 * X[:, 0] ** 2 * 4)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_random_dag(seed):
    fn = random_dag(seed)
    kern = cback.build(fn, name=f"test_dag{seed}")
    rng = np.random.default_rng(seed)
    X = log_uniform(rng, (19, fn.n_inputs))
    Y = kern(X)
    np.testing.assert_allclose(Y, numpy_reference(fn, X), rtol=1e-14, atol=0)
    assert_close_mp(Y[:6], mpmath_reference(fn, X[:6]))


def test_briggs_haldane_closed_form():
    fn, es = briggs_haldane()
    kern = cback.build(fn, name="test_bh")
    rng = np.random.default_rng(7)
    X = log_uniform(rng, (40, 4), -4, 4)
    k1, S, km1, k2 = X.T
    K_M = (km1 + k2) / k1  # Briggs & Haldane, Biochem. J. 19 (1925) 338
    np.testing.assert_allclose(kern(X)[:, es], S / (S + K_M), rtol=4e-15)


@pytest.mark.parametrize("n", [1, 7, 8, 9, 16, 17])
def test_partial_blocks(kernels, n):
    fn, kern = kernels["three"]
    X = log_uniform(np.random.default_rng(n), (n, fn.n_inputs))
    out = np.full((n + 3, len(fn.outputs)), -1.0)
    assert kern.run(np.vstack([X, np.ones((3, fn.n_inputs))]), out, 0, n) == 0
    np.testing.assert_allclose(out[:n], numpy_reference(fn, X), rtol=1e-14)
    assert np.all(out[n:] == -1.0)  # rows outside the range are not touched


def test_emit_is_deterministic_and_positional():
    a = cback.emit(steady_function("q2"), name="ring model-1")
    b = cback.emit(steady_function("q2"), name="ring model-1")
    assert a == b
    assert sorted(a) == ["ring_model_1.c", "ring_model_1.h"]
    assert cback.c_identifier("9lives") == "tf_9lives"
    body, _, tail = a["ring_model_1.c"].rpartition("const char ring_model_1_version[]")
    digest = hashlib.sha256(body.encode()).hexdigest()
    assert f'"sha256:{digest}"' in tail


def test_slot_reuse_keeps_workspace_small():
    fn = steady_function("q3")
    slot, n_slots = cback.allocate_slots(fn)
    assert n_slots < cback.computed_rows(fn) / 3
    # no slot is overwritten while its value is still needed
    g, holder = fn.graph, {}
    for i in range(len(g)):
        for a in g.args[i]:
            if a in slot:
                assert holder[slot[a]] == a
        if i in slot:
            holder[slot[i]] = i
    assert all(holder[slot[o]] == o for o in fn.outputs if o in slot)


def test_abi_round_trip_with_main(tmp_path, kernels):
    fn, kern = kernels["q2"]
    files = {**cback.emit(fn, name="ring"), **cback.embed_example(fn, "ring")}
    for fname, text in files.items():
        (tmp_path / fname).write_text(text)
    assert "gcc" in files["BUILD.txt"]
    cc = shutil.which("gcc") or shutil.which("cc")
    flags = list(cback.flags_for(fn)) + ["-Wall", "-Wextra", "-pedantic", "-Werror"]
    subprocess.run([cc, *flags, "-o", str(tmp_path / "ring"), "main.c", "ring.c", "-lm"],
                   cwd=tmp_path, check=True, capture_output=True)
    x = log_uniform(np.random.default_rng(3), (1, fn.n_inputs))
    res = subprocess.run([str(tmp_path / "ring"), *[repr(float(v)) for v in x[0]]],
                         capture_output=True, text=True, check=True)
    printed = np.array([float(line) for line in res.stdout.split()])
    assert np.array_equal(printed, kern(x)[0])  # %.17g round-trips a double exactly
    bad = subprocess.run([str(tmp_path / "ring"), "nan"], capture_output=True, text=True)
    assert bad.returncode == 1 and "row 0" in bad.stderr


def test_non_finite_input_status(kernels):
    fn, kern = kernels["three"]
    X = log_uniform(np.random.default_rng(9), (30, fn.n_inputs))
    X[13, 2] = np.nan
    X[21, 0] = np.inf
    out = np.zeros((30, len(fn.outputs)))
    assert kern.run(X, out, 0, 30) == 14
    np.testing.assert_allclose(out[:13], numpy_reference(fn, X[:13]), rtol=1e-14)
    assert kern.run(X, out, 14, 30) == 22
    X[21, 0] = -np.inf
    assert kern.run(X, out, 15, 30) == 22
    assert kern.run(X, out, 22, 30) == 0
    with pytest.raises(EvaluationError, match="row 13"):
        kern(X)


def test_kernel_pickles_in_process_and_in_child(kernels):
    fn, kern = kernels["q2"]
    X = log_uniform(np.random.default_rng(4), (50, fn.n_inputs))
    blob = pickle.dumps(kern)
    again = pickle.loads(blob)
    assert again.version == kern.version
    assert np.array_equal(again(X), kern(X))
    code = ("import json, pickle, sys, numpy as np; k = pickle.loads(sys.stdin.buffer.read()); "
            f"X = np.ones((3, {fn.n_inputs})); sys.stdout.write(json.dumps(k(X)[0].tolist()))")
    res = subprocess.run([sys.executable, "-c", code], input=blob, capture_output=True, check=True)
    child = json.loads(res.stdout)
    np.testing.assert_array_equal(child, kern(np.ones((1, fn.n_inputs)))[0])
    # equal rates on every edge of a ring: the generator is doubly stochastic,
    # so the steady state is uniform (common practice)
    np.testing.assert_allclose(child, 0.25, rtol=1e-15)


def test_two_threads_equal_one(kernels):
    fn, kern = kernels["q3"]
    X = log_uniform(np.random.default_rng(8), (20_011, fn.n_inputs))
    assert np.array_equal(kern(X, threads=2), kern(X, threads=1))


def test_constant_function_without_inputs():
    g = ir.Graph()
    half = g.const(Fraction(1, 2))
    fn = ir.Function(g, 0, [])
    fn.add_group("out", [half, g.add(half, g.const(Fraction(1, 3)))])
    kern = cback.build(fn, name="constants")
    Y = kern(np.empty((11, 0)))
    # the constant 1/3 becomes the nearest double, then one IEEE addition
    np.testing.assert_array_equal(Y, np.tile([0.5, 0.5 + 1 / 3], (11, 1)))
