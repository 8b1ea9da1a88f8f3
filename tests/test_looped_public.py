"""The public call of looped-path models whose rates are bare symbols.

When every edge's rate is one symbol and every symbol one edge's rate,
``steady_state`` hands X (or its columns in edge order) straight to the
elimination kernel and takes the checked path only when the kernel refuses a
set. These tests demand the same bits as the checked path (``_use_fused =
False``), the same refusals word for word, the zero-input (absent edge)
solutions, and agreement with an mpmath LU solve at 50 digits
(tests/schemes.mp_steady_state, outside the project's own solvers).
"""

import numpy as np
import pytest

from .schemes import hypercube, hypercube_scheme, mp_steady_state
from treeflux.compiler import Scheme, compile_scheme
from treeflux.runtime.errors import EvaluationError


def checked_path(m, X, **kw):
    m._use_fused = False
    try:
        return m.steady_state(X, **kw)
    finally:
        m._use_fused = True


def permuted_scheme():
    """Q3 with its symbols declared in an order unlike the edges' (z..., a...),
    so the rates are a permutation of X's columns."""
    n, edges = hypercube(3)
    s = Scheme(name="q3perm")
    names = [f"{'za'[e % 2]}{e}" for e in range(len(edges))]
    for name in sorted(names):
        s.add_parameter(name)
    for (i, j), name in zip(edges, names):
        s.add_edge(f"s{i}", f"s{j}", name)
    return s, n, edges, names


@pytest.fixture(scope="module")
def q4():
    return compile_scheme(hypercube_scheme(4), method="numeric", backend="python")


@pytest.fixture(scope="module")
def q3perm():
    s, n, edges, names = permuted_scheme()
    return compile_scheme(s, method="numeric", backend="python"), n, edges, names


def test_bare_rates_are_found(q4, q3perm):
    assert q4._rate_columns is not None and q4._rates_are_X
    m = q3perm[0]
    assert m._rate_columns is not None and not m._rates_are_X
    s = Scheme(name="shared")
    s.add_edge("A", "B", "k")
    s.add_edge("B", "A", "k")                      # one symbol on two edges: not a bijection
    s.add_edge("B", "C", "2*k")
    s.add_edge("C", "A", "k")
    assert compile_scheme(s, method="numeric")._rate_columns is None
    s = Scheme(name="product")
    s.add_edge("A", "B", "kon*c")
    s.add_edge("B", "A", "koff")
    assert compile_scheme(s, method="numeric")._rate_columns is None


@pytest.mark.parametrize("which", ["identity", "permuted"])
def test_same_bits_as_the_checked_path(q4, q3perm, which):
    m = q4 if which == "identity" else q3perm[0]
    rng = np.random.default_rng(3)
    X = 10.0 ** rng.uniform(-6, 6, size=(5_003, len(m.symbols)))
    X[17] = 10.0 ** rng.uniform(-300, 300, size=len(m.symbols))   # a stiff row: recomputed in extended range
    lean = m.steady_state(X)
    np.testing.assert_array_equal(lean, checked_path(m, X))
    out = np.full_like(lean, np.nan)
    assert m.steady_state(X, out=out) is out
    np.testing.assert_array_equal(out, lean)
    np.testing.assert_array_equal(m.steady_state(X, threads=1), lean)


def test_against_mpmath(q3perm):
    m, n, edges, names = q3perm
    rng = np.random.default_rng(5)
    X = 10.0 ** rng.uniform(-4, 4, size=(6, len(m.symbols)))
    P = m.steady_state(X)
    index = [m.states.index(f"s{i}") for i in range(n)]
    for r in range(len(X)):
        rates = [X[r, m.symbols.index(name)] for name in names]
        ref = mp_steady_state(n, edges, rates)                   # mpmath LU, 50 digits
        np.testing.assert_allclose(P[r, index], ref, rtol=1e-12)


@pytest.mark.parametrize("value, fragment", [
    (np.nan, "is not finite"), (np.inf, "is not finite"), (-1.0, "must be positive"), (0.0, "must be positive"),
])
def test_refusals_are_the_checked_paths(q4, value, fragment):
    X = np.full((300, len(q4.symbols)), 2.0)
    X[211, 7] = value
    with pytest.raises(EvaluationError) as lean:
        q4.steady_state(X)
    with pytest.raises(EvaluationError) as checked:
        checked_path(q4, X)
    assert str(lean.value) == str(checked.value)
    assert fragment in str(lean.value) and "row 211" in str(lean.value) and q4.symbols[7] in str(lean.value)


def test_zero_input_removes_its_edge():
    """An input of 0 is an absent edge: the kernel refuses the set and the
    checked path solves it on the positive subgraph."""
    s = Scheme(name="cycle")
    for k in ("kb", "kc", "ka"):
        s.add_parameter(k)
    s.add_input("c")
    s.add_edge("A", "B", "c")
    s.add_edge("B", "A", "kb")
    s.add_edge("B", "C", "kc")
    s.add_edge("C", "A", "ka")
    m = compile_scheme(s, method="numeric")
    assert m._rate_columns is not None
    X = np.vstack([m.as_array({"kb": 1.0, "kc": 2.0, "ka": 3.0, "c": c}) for c in (0.5, 0.0)])
    P = m.steady_state(X)
    np.testing.assert_array_equal(P, checked_path(m, X))
    # Matrix-Tree theorem, in-trees counted by hand: p_A ∝ ka·(kb + kc),
    # p_B ∝ c·ka, p_C ∝ c·kc; at c = 0.5: 9, 1.5, 1 over 11.5
    ref = np.array([9.0, 1.5, 1.0]) / 11.5
    np.testing.assert_allclose(P[0, [m.states.index(x) for x in "ABC"]], ref, rtol=1e-15)
    # with c = 0 nothing leaves A: all probability on A (exact)
    assert P[1, m.states.index("A")] == 1.0 and P[1].sum() == 1.0


def mass_action_q4():
    """Q4 where every third edge's rate is k·c (an input): the rates are not
    bare symbols, so the label kernel (symbol checks fused) feeds the plan."""
    n, edges = hypercube(4)
    s = Scheme(name="q4ma")
    for e in range(len(edges)):
        s.add_parameter(f"k{e}")
    s.add_input("c")
    for e, (i, j) in enumerate(edges):
        s.add_edge(f"s{i}", f"s{j}", f"k{e}*c" if e % 3 == 0 else f"k{e}")
    return s, n, edges


@pytest.fixture(scope="module")
def q4ma():
    s, n, edges = mass_action_q4()
    return compile_scheme(s, method="numeric", backend="llvm"), n, edges


def test_labelled_rates_same_bits_and_refusals(q4ma):
    m, n, edges = q4ma
    assert m._rate_columns is None and m._rate_kernel is not None
    rng = np.random.default_rng(11)
    X = 10.0 ** rng.uniform(-5, 5, size=(4_099, len(m.symbols)))
    lean = m.steady_state(X)
    np.testing.assert_array_equal(lean, checked_path(m, X))
    out = np.empty_like(lean)
    assert m.steady_state(X, out=out) is out
    np.testing.assert_array_equal(out, lean)
    c = m.symbols.index("c")
    for r in (0, 7, 8, 15, 16, 4_098):                  # lanes of a block, the padded tail
        Y = X.copy()
        Y[r, c] = np.nan
        with pytest.raises(EvaluationError) as lean_err:
            m.steady_state(Y)
        with pytest.raises(EvaluationError) as checked_err:
            checked_path(m, Y)
        assert str(lean_err.value) == str(checked_err.value)
        assert f"row {r}" in str(lean_err.value) and "'c'" in str(lean_err.value)


def test_labelled_rates_zero_input_and_mpmath(q4ma):
    m, n, edges = q4ma
    rng = np.random.default_rng(13)
    X = 10.0 ** rng.uniform(-3, 3, size=(5, len(m.symbols)))
    X[2, m.symbols.index("c")] = 0.0                     # the k·c edges are absent in row 2
    P = m.steady_state(X)
    np.testing.assert_array_equal(P, checked_path(m, X))
    index = [m.states.index(f"s{i}") for i in range(n)]
    for r in (0, 1, 3):
        values = dict(zip(m.symbols, X[r]))
        rates = [values[f"k{e}"] * (values["c"] if e % 3 == 0 else 1.0) for e in range(len(edges))]
        ref = mp_steady_state(n, edges, rates)                   # mpmath LU, 50 digits
        np.testing.assert_allclose(P[r, index], ref, rtol=1e-12)


def test_labelled_rate_that_overflows_is_refused_like_the_checked_path(q4ma):
    """k·c = 1e200 · 1e200 is inf: the label kernel flags the row (its rates
    must be finite) and the checked path names the edge."""
    m, n, edges = q4ma
    X = np.full((40, len(m.symbols)), 2.0)
    X[33, m.symbols.index("k0")] = 1e200
    X[33, m.symbols.index("c")] = 1e200
    rates = np.empty((40, len(edges)))
    status = np.empty(40, dtype=np.uint8)
    assert m._rate_kernel.check(X, rates, status, 1) == 1 and status[33] != 0
    with pytest.raises(EvaluationError) as lean:
        m.steady_state(X)
    with pytest.raises(EvaluationError) as checked:
        checked_path(m, X)
    assert str(lean.value) == str(checked.value)
    assert "row 33" in str(lean.value) and "inf" in str(lean.value)
