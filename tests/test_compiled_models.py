"""Whole compiled models through every back end: agreement, derivatives, emitted code."""

import json
import re
from pathlib import Path

import mpmath
import numpy as np
import pytest

from treeflux.compiler import compile_scheme, load

from .schemes import hypercube, mp_steady_state, rate_scheme
from .test_steady_state import briggs_haldane

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
BACKENDS = ["python", "c", "llvm", "cython"]


@pytest.mark.parametrize("method", ["trees", "elimination"])
def test_backends_agree_on_q3(method):
    # Every back end against the python one and against a 50-digit mpmath
    # solve of the Laplacian (the outside reference), 1e-14 / 1e-13 relative.
    n, edges = hypercube(3)
    s, order = rate_scheme(n, edges)
    X = 10 ** np.random.default_rng(4).uniform(-3, 3, size=(37, len(edges)))
    results = {b: compile_scheme(s, method=method, backend=b).steady_state(X) for b in BACKENDS}
    for b in BACKENDS:
        np.testing.assert_allclose(results[b], results["python"], rtol=1e-14, atol=0)
    for row in (0, 17, 36):
        ref = mp_steady_state(n, edges, X[row])
        for a, st in enumerate(order):
            assert abs(results["c"][row, a] - ref[st]) <= 1e-13 * ref[st]


@pytest.mark.parametrize("backend", BACKENDS)
def test_michaelis_menten_derivatives(backend):
    # Briggs–Haldane steady state p_ES = S/(S+K_M), K_M = (k_-1+k_2)/k_1:
    # dp/dS = K_M/(S+K_M)^2, d²p/dS² = -2 K_M/(S+K_M)^3 (calculus on the
    # published closed form); dp/dk1 = S K_M / (k1 (S+K_M)^2).
    m = compile_scheme(briggs_haldane(), backend=backend, jacobian=True, input_derivatives="S")
    X = 10 ** np.random.default_rng(9).uniform(-2, 2, size=(25, 4))
    k1, km1, k2, S = X.T
    KM = (km1 + k2) / k1
    d1, d2 = m.input_derivatives(X)
    np.testing.assert_allclose(d1[:, 1], KM / (S + KM) ** 2, rtol=1e-12)
    np.testing.assert_allclose(d2[:, 1], -2 * KM / (S + KM) ** 3, rtol=1e-11)
    np.testing.assert_allclose(d1[:, 0], -d1[:, 1], rtol=1e-12)
    J = m.jacobian(X)
    assert J.shape == (25, 2, 4)
    np.testing.assert_allclose(J[:, 1, 0], S * KM / (k1 * (S + KM) ** 2), rtol=1e-12)
    np.testing.assert_allclose(J[:, 1, 3], d1[:, 1], rtol=1e-13)
    np.testing.assert_allclose(J.sum(axis=1), 0, atol=1e-12 * np.abs(J).max())


def test_log_jacobian_and_observable_gradient():
    s = load(EXAMPLES / "enzyme_competitive_inhibitor.toml")
    plain = compile_scheme(s, jacobian=True)
    logged = compile_scheme(s, jacobian=True, log_jacobian=True)
    X = plain.as_array({})
    np.testing.assert_allclose(logged.jacobian(X), plain.jacobian(X) * X[:, None, :], rtol=1e-13, atol=1e-300)
    # Observable "saturation" is p_ES: its gradient is that row of the Jacobian.
    G = plain.observable_jacobian(X)
    es = plain.states.index("ES")
    np.testing.assert_allclose(G[:, 0, :], plain.jacobian(X)[:, es, :], rtol=1e-14)


def test_jacobian_against_mpmath_finite_differences_q3():
    # Central differences in 50-digit mpmath (step 1e-20 relative: truncation
    # ~1e-40, rounding ~1e-30) as the reference for the Q3 Jacobian.
    n, edges = hypercube(3)
    s, order = rate_scheme(n, edges)
    m = compile_scheme(s, backend="llvm", jacobian=True)
    x = 10 ** np.random.default_rng(1).uniform(-2, 2, size=len(edges))
    J = m.jacobian(x[None, :])[0]
    with mpmath.workdps(50):
        for j in (0, 5, 23):
            h = mpmath.mpf(x[j]) * mpmath.mpf("1e-20")
            up, dn = list(x), list(x)
            up[j] = mpmath.mpf(x[j]) + h
            dn[j] = mpmath.mpf(x[j]) - h
            pu = mp_steady_state(n, edges, up, floats=False)
            pd = mp_steady_state(n, edges, dn, floats=False)
            for a, st in enumerate(order):
                ref = (pu[st] - pd[st]) / (2 * h)
                assert abs(J[a, j] - float(ref)) <= 1e-11 * max(abs(float(ref)), 1e-300) + 1e-15


@pytest.mark.parametrize("target", BACKENDS)
def test_emit_every_target_is_deterministic(tmp_path, target):
    s = load(EXAMPLES / "promoter_two_activators.toml")
    m = compile_scheme(s)
    a = {p.name: p.read_bytes() for p in m.emit(target, tmp_path / "a")}
    b = {p.name: p.read_bytes() for p in m.emit(target, tmp_path / "b")}
    assert a == b and a
    layout = json.loads(a.pop("promoter_with_two_activator_sites.layout.json"))
    assert layout["symbols"] == list(m.symbols) and layout["outputs"]["p"] == list(m.states)
    for text in a.values():
        for name in (b"ABP", b"k_init", b"a_off"):
            # names enter generated code only as quoted literals (and C index constants)
            for line in text.splitlines():
                bare = re.sub(rb"_(STATE|SYMBOL|OBS)_" + name + rb"\b", b"", line)
                assert bare.count(name) == bare.count(b"'" + name + b"'") + bare.count(b'"' + name + b'"')


def test_emitted_c_example_builds_and_runs(tmp_path):
    # The ABI round trip: gcc builds the emitted main.c against the emitted
    # source, and its printout matches the in-process evaluation.
    import subprocess
    s = load(EXAMPLES / "enzyme_competitive_inhibitor.toml")
    m = compile_scheme(s, backend="c")
    files = {p.name: p for p in m.emit("c", tmp_path)}
    assert "main.c" in files and "BUILD.txt" in files
    c_files = [str(p) for name, p in files.items() if name.endswith(".c")]
    exe = tmp_path / "demo"
    subprocess.run(["gcc", "-O2", "-std=c99", "-o", str(exe), *c_files, "-lm"], check=True)
    x = m.as_array({})[0]
    res = subprocess.run([str(exe), *map(repr, x.tolist())], capture_output=True, text=True, check=True)
    printed = [float(line.split("\t")[0]) for line in res.stdout.splitlines()]  # value, tab, name
    np.testing.assert_allclose(printed[:len(m.states)], m.steady_state(x[None, :])[0], rtol=1e-15)
