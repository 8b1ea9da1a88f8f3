"""Tests of the Cython back end (compiler/backends/cython.py).

References as in tests/test_backend_c.py (whose hand-built functions this
file reuses): the IR's numpy and 50-digit mpmath evaluators, the master
equation, the Briggs–Haldane closed form. A Cython build takes seconds, so
the functions under test are stacked side by side into one module; one of
them is a random DAG long enough that the body is split into several parts.
"""

from __future__ import annotations

import hashlib
import json
import pickle
import subprocess
import sys
from fractions import Fraction

import numpy as np
import pytest

from .test_backend_c import (THREE, assert_close_mp, balance_residual, briggs_haldane, edges_of,
                            log_uniform, mpmath_reference, numpy_reference, op_zoo, random_dag,
                            stack, steady_function)
from treeflux.compiler import ir
from treeflux.compiler.backends import c as cback
from treeflux.compiler.backends import cython as cyback
from treeflux.runtime.errors import EvaluationError


@pytest.fixture(scope="module")
def parts():
    """(Function, input slice, output slice) of each stacked piece."""
    bh, es = briggs_haldane()
    fns = {"zoo": op_zoo(), "three": steady_function("three"), "q2": steady_function("q2"),
           "dag": random_dag(4), "bh": bh,
           "long": random_dag(11, n_inputs=5, n_nodes=160)}
    table, i0, o0 = {}, 0, 0
    for key, fn in fns.items():
        table[key] = (fn, slice(i0, i0 + fn.n_inputs), slice(o0, o0 + len(fn.outputs)))
        i0 += fn.n_inputs
        o0 += len(fn.outputs)
    whole = stack(list(fns.values()))
    return table, whole, es


@pytest.fixture(scope="module")
def kernel(parts):
    _, whole, _ = parts
    return cyback.build(whole, name="stacked")


def inputs(parts, n, seed):
    """Each piece gets inputs where its reference is well defined."""
    table, whole, _ = parts
    rng = np.random.default_rng(seed)
    X = log_uniform(rng, (n, whole.n_inputs))
    X[:, table["zoo"][1]] = rng.uniform(0.5, 2.0, (n, 3))
    X[:, table["long"][1]] = rng.uniform(0.1, 10.0, (n, 5))  # keeps exp() finite
    return X


def test_openmp_flag_is_recorded(kernel):
    assert kernel.openmp is cyback.openmp_available()
    assert kernel.backend == "cython"


def test_steady_states_agree_and_balance(parts, kernel):
    table, whole, _ = parts
    X = inputs(parts, 33, 1)
    Y = kernel(X)
    for key in ("three", "q2"):
        fn, si, so = table[key]
        P = Y[:, so]
        np.testing.assert_allclose(P, numpy_reference(fn, X[:, si]), rtol=1e-14, atol=0)
        assert_close_mp(P[:8], mpmath_reference(fn, X[:8, si]))
        assert balance_residual(edges_of(key), X[:, si], P) < 1e-12
    assert len(THREE) == table["three"][1].stop - table["three"][1].start


def test_every_op_and_random_dag_against_references(parts, kernel):
    table, _, _ = parts
    X = inputs(parts, 17, 2)
    Y = kernel(X)
    fn, si, so = table["zoo"]
    np.testing.assert_allclose(Y[:, so], numpy_reference(fn, X[:, si]), rtol=1e-14, atol=0)
    ref = mpmath_reference(fn, X[:, si])
    assert_close_mp(Y[:, so][:, :-1], [r[:-1] for r in ref])  # last one cancels (a² − b²)
    fn, si, so = table["dag"]
    np.testing.assert_allclose(Y[:, so], numpy_reference(fn, X[:, si]), rtol=1e-14, atol=0)
    assert_close_mp(Y[:6, so], mpmath_reference(fn, X[:6, si]))


def test_briggs_haldane_closed_form(parts, kernel):
    table, _, es = parts
    X = inputs(parts, 40, 3)
    _, si, so = table["bh"]
    k1, S, km1, k2 = X[:, si].T
    K_M = (km1 + k2) / k1  # Briggs & Haldane, Biochem. J. 19 (1925) 338
    np.testing.assert_allclose(kernel(X)[:, so][:, es], S / (S + K_M), rtol=4e-15)


def test_emit_is_deterministic_and_versioned(parts):
    _, whole, _ = parts
    a = cyback.emit(whole, name="stacked")
    assert a == cyback.emit(whole, name="stacked")
    text = a["stacked.pyx"]
    body, _, tail = text.rpartition("VERSION = ")
    assert tail.strip() == f'"sha256:{hashlib.sha256(body[:-1].encode()).hexdigest()}"'


def test_non_finite_input_status_serial_and_parallel(parts, kernel):
    _, whole, _ = parts
    X = inputs(parts, 5000, 5)
    X[1234, 7] = np.nan
    X[4000, 0] = -np.inf
    out = np.zeros((5000, len(whole.outputs)))
    assert kernel.module.run(X, out, 0, 5000, 1) == 1235
    assert kernel.module.run(X, out, 0, 5000, 2) == 1235
    assert kernel.module.run(X, out, 1235, 5000, 2) == 4001
    with pytest.raises(EvaluationError, match="row 1234"):
        kernel(X)
    with pytest.raises(ValueError, match="shape"):
        kernel.module.run(np.ascontiguousarray(X[:, 1:]), out, 0, 5000, 1)


def test_two_threads_equal_one(parts, kernel):
    X = inputs(parts, 30_001, 6)
    assert np.array_equal(kernel(X, threads=2), kernel(X, threads=1))


def test_kernel_pickles_in_process_and_in_child(parts, kernel):
    _, whole, _ = parts
    X = inputs(parts, 20, 7)
    blob = pickle.dumps(kernel)
    again = pickle.loads(blob)
    assert again.version == kernel.version and again.openmp == kernel.openmp
    assert np.array_equal(again(X), kernel(X))
    code = ("import json, pickle, sys, numpy as np; k = pickle.loads(sys.stdin.buffer.read()); "
            "X = np.array(json.loads(sys.argv[1])); sys.stdout.write(json.dumps(k(X).tolist()))")
    res = subprocess.run([sys.executable, "-c", code, json.dumps(X[:3].tolist())], input=blob,
                         capture_output=True, check=True)
    assert np.array_equal(np.array(json.loads(res.stdout)), kernel(X[:3]))


def test_without_openmp_falls_back_and_says_so(monkeypatch):
    fn = steady_function("three")
    monkeypatch.setattr(cyback, "openmp_available", lambda: False)
    with pytest.warns(RuntimeWarning, match="no OpenMP"):
        kern = cyback.build(fn, name="serial")
    assert kern.openmp is False and kern.parallel is True
    X = log_uniform(np.random.default_rng(10), (9000, fn.n_inputs))
    Y = kern(X, threads=2)
    np.testing.assert_allclose(Y, numpy_reference(fn, X), rtol=1e-14, atol=0)
    assert np.array_equal(Y, kern(X, threads=1))
    assert balance_residual(edges_of("three"), X, Y) < 1e-12


def test_long_body_is_split_into_parts_and_agrees(parts, kernel):
    table, whole, _ = parts
    fn, si, so = table["long"]
    assert cback.computed_rows(whole) > 2 * cback.CHUNK_ROWS
    text = cyback.emit(whole, name="stacked")["stacked.pyx"]
    n_parts = -(-cback.computed_rows(whole) // cback.CHUNK_ROWS)
    assert text.count("void tf_part") == n_parts and f"tf_part{n_parts - 1}(in, w)" in text
    X = inputs(parts, 21, 8)
    assert np.all(np.isfinite(kernel(X)))
    np.testing.assert_allclose(kernel(X)[:, so], numpy_reference(fn, X[:, si]), rtol=1e-14, atol=0)
    assert_close_mp(kernel(X[:4])[:, so], mpmath_reference(fn, X[:4, si]))


def test_lane_loops_cover_every_row_in_a_reused_workspace(parts):
    _, whole, _ = parts
    text = cyback.emit(whole, name="stacked")["stacked.pyx"]
    _, n_slots = cback.allocate_slots(whole)
    import re
    assert len(re.findall(r"^    TF_(ROW|LANEWISE)\(TF_[VL]\(w\[", text, re.M)) == cback.computed_rows(whole)
    assert n_slots < cback.computed_rows(whole) / 2  # liveness lets slots be reused
    words = (whole.n_inputs + len(whole.outputs)) * cback.LANES  # inputs, then results
    assert f"malloc({words} * sizeof(double) + 64)" in text
    assert "cdef double t" not in text  # no scalar row temporaries left


@pytest.mark.parametrize("threads", [1, 2])
def test_partial_blocks_and_sub_ranges(parts, kernel, threads):
    _, whole, _ = parts
    X = inputs(parts, 61, 9)
    full = kernel(X)
    for start, stop in [(0, 1), (0, 7), (3, 11), (5, 21), (8, 16), (9, 61), (17, 17)]:
        out = np.full_like(full, -1.0)
        assert kernel.module.run(X, out, start, stop, threads) == 0
        assert np.array_equal(out[start:stop], full[start:stop])
        assert np.all(out[:start] == -1.0) and np.all(out[stop:] == -1.0)  # untouched


@pytest.mark.parametrize("bad", [0, 7, 8, 13, 39])
def test_serial_refusal_writes_rows_before_only(parts, kernel, bad):
    _, whole, _ = parts
    X = inputs(parts, 40, 10)
    ref = kernel(X)
    X[bad, 3] = np.inf
    out = np.full_like(ref, -1.0)
    assert kernel.module.run(X, out, 0, 40, 1) == bad + 1
    assert np.array_equal(out[:bad], ref[:bad])
    assert np.all(out[bad:] == -1.0)
    out = np.full_like(ref, -1.0)
    assert kernel.module.run(X, out, 0, 40, 3) == bad + 1
    assert np.array_equal(out[:bad], ref[:bad])


def test_constant_function_without_inputs():
    g = ir.Graph()
    half = g.const(Fraction(1, 2))
    fn = ir.Function(g, 0, [])
    fn.add_group("out", [half, g.add(half, g.const(Fraction(1, 3)))])
    kern = cyback.build(fn, name="constants")
    # the constant 1/3 becomes the nearest double, then one IEEE addition
    np.testing.assert_array_equal(kern(np.empty((11, 0))), np.tile([0.5, 0.5 + 1 / 3], (11, 1)))
    assert kern.module.run(np.empty((0, 0)), np.empty((0, 2)), 0, 0, 2) == 0
