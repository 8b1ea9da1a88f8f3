"""Tests of the Cython back end (compiler/backends/cython.py).

References as in tests/test_backend_c.py (whose hand-built functions this
file reuses): the IR's numpy and 50-digit mpmath evaluators, the master
equation, the Briggs–Haldane closed form. A Cython build takes seconds, so
the functions under test are stacked side by side into one module.
"""

from __future__ import annotations

import hashlib
import json
import pickle
import subprocess
import sys

import numpy as np
import pytest

from .test_backend_c import (THREE, assert_close_mp, balance_residual, briggs_haldane, edges_of,
                            log_uniform, mpmath_reference, numpy_reference, op_zoo, random_dag,
                            stack, steady_function)
from treeflux.compiler.backends import cython as cyback
from treeflux.runtime.errors import EvaluationError


@pytest.fixture(scope="module")
def parts():
    """(Function, input slice, output slice) of each stacked piece."""
    bh, es = briggs_haldane()
    fns = {"zoo": op_zoo(), "three": steady_function("three"), "q2": steady_function("q2"),
           "dag": random_dag(4), "bh": bh}
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
