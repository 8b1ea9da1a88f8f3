"""Big straight-line bodies: split and vector forms give the same bits, and a
numeric-sized scheme emits standalone C that gcc compiles strictly.

References: the unsplit body and the portable lane-loop form (-DTF_PORTABLE)
of the same operations; the 64-state scheme's main is checked against an
mpmath LU solve at 50 digits (tests/schemes.mp_steady_state) and the API.
No timings are asserted here (benches/bench_compile.py measures them)."""

from __future__ import annotations

import shutil
import subprocess

import numpy as np
import pytest

from .schemes import hypercube, hypercube_scheme, mp_steady_state

from treeflux.compiler.backends import c as cback
from treeflux.compiler.backends import cython as cyback
from treeflux.compiler.pipeline import compile_scheme, emit

CC = shutil.which("gcc") or shutil.which("cc")
STRICT = ["-std=c99", "-Wall", "-Wextra", "-pedantic", "-Werror"]


def kernel_function(d):
    """The IR Function a C kernel of Q_d evaluates (captured from compile_scheme)."""
    captured = {}
    real = cback.build

    def grab(fn, *, name="treeflux_model", **options):
        captured["fn"] = fn
        return real(fn, name=name, **options)

    cback.build = grab
    try:
        compile_scheme(hypercube_scheme(d), backend="c", cache=False)
    finally:
        cback.build = real
    return captured["fn"]


def _rates(n_rows, n_cols, seed):
    rng = np.random.default_rng(seed)
    return np.exp(rng.uniform(np.log(1e-3), np.log(1e3), (n_rows, n_cols)))


@pytest.mark.parametrize("d", [3, 4])
def test_split_unsplit_and_portable_forms_give_the_same_bits(d, monkeypatch):
    fn = kernel_function(d)
    X = _rates(203, fn.n_inputs, d)  # 25 full blocks and a partial one
    split = cback.build(fn, name=f"split{d}")(X)
    monkeypatch.setattr(cback, "CHUNK_ROWS", 10 ** 9)
    whole_src = cback.emit(fn, name=f"whole{d}")
    assert whole_src[f"whole{d}.c"].count("void tf_part") == 1
    whole = cback.build_from_source(whole_src, f"whole{d}", fn.n_inputs, len(fn.outputs),
                                    cback.flags_for(fn))(X)
    portable = cback.build_from_source(whole_src, f"whole{d}", fn.n_inputs, len(fn.outputs),
                                       (*cback.flags_for(fn), "-DTF_PORTABLE"))(X)
    assert np.array_equal(split, whole) and np.array_equal(split, portable)
    monkeypatch.setattr(cback, "CHUNK_ROWS", 7)
    tiny = cback.build(fn, name=f"tiny{d}")(X)
    assert np.array_equal(split, tiny)
    # mpmath at 50 digits on a few rows (tests/schemes.mp_steady_state)
    n, edges = hypercube(d)
    s = hypercube_scheme(d)
    col = {name: j for j, name in enumerate(s.symbols)}
    order = [int(name[1:]) for name in s.states]
    for r in range(3):
        ref = mp_steady_state(n, edges, [X[r, col[f"k{i}_{j}"]] for i, j in edges])
        np.testing.assert_allclose(split[r, :n], [ref[k] for k in order], rtol=1e-13)


@pytest.mark.parametrize("d", [3, 4])
def test_cython_gives_the_c_bits(d):
    fn = kernel_function(d)
    X = _rates(77, fn.n_inputs, 10 + d)
    assert np.array_equal(cyback.build(fn, name=f"cy{d}")(X), cback.build(fn, name=f"c{d}")(X))


def test_numeric_sized_scheme_emits_strict_c_that_matches_the_api(tmp_path):
    s = hypercube_scheme(6)  # 64 states, ~17,800 flops; bench_compile runs Q7 (128 states)
    paths = emit(s, "c", tmp_path)
    assert {p.name for p in paths} >= {"q6.c", "q6.h", "main.c"}
    subprocess.run([CC, "-O1", *STRICT, "-o", str(tmp_path / "q6"), "main.c", "q6.c", "-lm"],
                   cwd=tmp_path, check=True, capture_output=True)
    x = _rates(1, len(s.symbols), 5)[0]
    res = subprocess.run([str(tmp_path / "q6"), *[repr(float(v)) for v in x]],
                         capture_output=True, text=True, check=True)
    printed = np.array([float(line.split("\t")[0]) for line in res.stdout.splitlines()])
    api = compile_scheme(s, backend="python", cache=False).steady_state(x[None, :])[0]
    np.testing.assert_allclose(printed[:len(s.states)], api, rtol=1e-13, atol=0)


def test_the_looped_size_is_refused_beyond_the_c_limit(monkeypatch):
    from treeflux.compiler import pipeline
    from treeflux.compiler.errors import TooLargeError
    monkeypatch.setattr(pipeline, "MAX_EMIT_C_OPS", 1000)
    monkeypatch.setattr(pipeline, "STRAIGHT_LINE_LIMIT", 100)
    with pytest.raises(TooLargeError, match="C takes up to 1,000"):
        emit(hypercube_scheme(5), "c", "/nonexistent-never-written")
