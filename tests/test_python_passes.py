"""The numpy back end's runtime kernels run a row range in passes of
1,024-4,096 rows (backends/python.rows_per_pass): the passes must give the
bits of one pass over the whole range, the same status bytes and counts, and
the steady state of an mpmath LU solve at 50 digits (tests/schemes.mp_steady_state)."""

import numpy as np

from treeflux.compiler import compile_scheme
from treeflux.compiler.backends.python import rows_per_pass
from treeflux.runtime.kernel import BAD_SYMBOL

from .schemes import hypercube, hypercube_scheme, mp_steady_state


def one_pass(kernel):
    """The generated row-range functions of a python kernel, without passes."""
    namespace: dict = {}
    exec(compile(kernel.recipe[1][0], "<test>", "exec"), namespace)
    return namespace["run"], namespace["run_checked"]


def test_rows_per_pass_follows_the_statement_count():
    body = lambda k: "\n    v" * k  # noqa: E731 — k statements of a generated body
    assert rows_per_pass(body(160)) == 4096       # 800,000 / 160 = 5,000 → 4,096
    assert rows_per_pass(body(746)) == 1024       # 1,072 → 1,024
    assert rows_per_pass(body(5)) == 4096         # capped above
    assert rows_per_pass(body(20_000)) == 1024    # and below


def test_passes_give_the_bits_of_one_pass_and_mpmath():
    m = compile_scheme(hypercube_scheme(4), backend="python")
    k = m.kernel
    step = rows_per_pass(k.recipe[1][0])
    N = 3 * step + 17                              # several passes and a short last one
    rng = np.random.default_rng(2)
    X = 10.0 ** rng.uniform(-3, 3, size=(N, k.n_inputs))
    run, run_checked = one_pass(k)
    whole = np.empty((N, k.n_outputs))
    with np.errstate(all="ignore"):
        run(X, whole, 0, N)
    np.testing.assert_array_equal(k(X), whole)
    # the checked entry: bad symbols planted in different passes
    X[[5, step + 3, 3 * step + 16], 2] = np.nan
    status, whole_status = np.zeros(N, np.uint8), np.zeros(N, np.uint8)
    out = np.empty_like(whole)
    count = k.check(X, out, status, 1)
    with np.errstate(all="ignore"):
        assert run_checked(X, whole, whole_status, 0, N) == count == 3
    np.testing.assert_array_equal(status, whole_status)
    assert set(np.flatnonzero(status & BAD_SYMBOL)) == {5, step + 3, 3 * step + 16}
    # an outside reference on rows of every pass
    n, edges = hypercube(4)
    index = [m.states.index(f"s{i}") for i in range(n)]
    for r in (0, step + 1, 2 * step + 2, N - 2):
        values = dict(zip(m.symbols, X[r]))
        ref = mp_steady_state(n, edges, [values[f"k{i}_{j}"] for i, j in edges])   # mpmath LU, 50 digits
        np.testing.assert_allclose(m.steady_state(X[r:r + 1])[0, index], ref, rtol=1e-12)
