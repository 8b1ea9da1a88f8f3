"""The looped numeric path's SIMD blocks (treeflux.runtime.numeric, gth_kernel.c):
the same bits for a parameter set whatever its lane, block width or thread;
per-set underflow flags and exact recomputes in mixed batches; zero rates in
some rows only; accuracy on random 200-state schemes against mpmath."""

import shutil

import mpmath
import numpy as np
import pytest

import treeflux.runtime.numeric as numeric
from treeflux.compiler import compile_scheme
from treeflux.runtime.errors import EvaluationError
from treeflux.runtime.numeric import EliminationPlan

from .schemes import mp_steady_state
from .test_numeric import log_uniform, max_rel_err, random_scheme

needs_c = pytest.mark.skipif(numeric._library() is None, reason="no working C compiler")
WIDEST = numeric.LANES * 4                     # sets in the widest block (4 vectors of 8)


def solve(plan, rates, groups, threads=1):
    plan.groups = groups
    return plan.steady_state(rates, threads=threads)


# ------------------------------------------------------------------ same bits

@needs_c
def test_same_bits_on_one_and_two_threads_and_every_block_width(monkeypatch):
    edges = random_scheme(200, 600, 1)
    rates = log_uniform(np.random.default_rng(1), (203, 600), 1e-3, 1e3)
    plan = EliminationPlan(200, edges)
    monkeypatch.setattr(numeric, "MIN_WORK_PER_THREAD", 1)      # split whatever the size
    monkeypatch.setattr(numeric, "MIN_WORK_PER_THREAD_POOLED", 1)
    ref = solve(plan, rates, 1, threads=1)
    np.testing.assert_allclose(ref.sum(axis=1), 1.0, rtol=1e-13)
    for groups in (1, 2, 4):
        for threads in (1, 2):
            assert np.array_equal(solve(plan, rates, groups, threads), ref), (groups, threads)


@needs_c
@pytest.mark.parametrize("groups", [1, 2, 4])
def test_same_bits_in_every_lane_position(groups):
    # One set placed at every residue modulo the widest block among random
    # neighbours: its row never changes, whatever the lane or block width.
    edges = random_scheme(40, 130, 2)
    rng = np.random.default_rng(2)
    target = log_uniform(rng, (1, 130), 1e-6, 1e6)
    plan = EliminationPlan(40, edges)
    alone = solve(plan, target, 1)[0]
    for pos in range(WIDEST):
        batch = log_uniform(rng, (WIDEST + 5, 130), 1e-6, 1e6)
        batch[pos] = target[0]
        assert np.array_equal(solve(plan, batch, groups)[pos], alone), pos


@needs_c
def test_sets_needing_the_exponent_path_keep_their_bits_and_neighbours():
    # Birth-death chain 0 <-> ... <-> 5 with up rate 1e100 and down 1e-100: by
    # detailed balance p_k ∝ 1e200^k (textbook birth-death formula, e.g. Norris,
    # Markov Chains, 1997, sect. 3.7), so x ratios reach 1e1000 and the set must
    # leave the plain-double back-substitution. Mixed with ordinary sets at every
    # lane position, its row and theirs keep their bits.
    n = 6
    edges = [(k, k + 1) for k in range(n - 1)] + [(k + 1, k) for k in range(n - 1)]
    wide = np.array([1e100] * (n - 1) + [1e-100] * (n - 1))
    plan = EliminationPlan(n, edges, order=[5, 4, 3, 2, 1, 0])
    rng = np.random.default_rng(3)
    ordinary = log_uniform(rng, (WIDEST, len(edges)), 1e-2, 1e2)
    plain = solve(plan, ordinary, 1)
    for groups in (1, 2, 4):
        for pos in range(0, WIDEST, 3):
            batch = ordinary.copy()
            batch[pos] = wide
            P = solve(plan, batch, groups)
            assert P[pos, 5] == pytest.approx(1.0, rel=1e-15)
            assert P[pos, 4] == pytest.approx(1e-200, rel=1e-13)
            assert (P[pos, :4] == 0.0).all()          # 1e-400 and below are not representable
            others = np.arange(WIDEST) != pos
            assert np.array_equal(P[others], plain[others])


# ----------------------------------------------------------------- underflow

@needs_c
def test_underflowing_sets_at_random_positions_are_flagged_and_recomputed():
    # 0 -> 1 at 1e-200, 1 -> 0 at 1e200, 1 -> 2 at 1e-200, 2 -> 0 at 1: eliminating
    # 1 first makes q(0->2) = 1e-600, below float64. Such sets, scattered through
    # a batch, are flagged by the kernel (NaN rows, exactly those) and recomputed
    # in extended range; reference: mpmath at 400 digits, checked at 800.
    edges = [(0, 1), (1, 0), (1, 2), (2, 0)]
    under = np.array([1e-200, 1e200, 1e-200, 1.0])
    rng = np.random.default_rng(4)
    batch = log_uniform(rng, (77, 4), 1e-3, 1e3)
    where = np.sort(rng.choice(77, size=9, replace=False))
    batch[where] = under
    plan = EliminationPlan(3, edges, order=[1, 0, 2])
    plan._prepare()
    for groups in (1, 2, 4):
        raw = np.empty((77, 3))
        plan.groups = groups
        plan._run_c(batch, raw, 1)
        assert np.array_equal(np.flatnonzero(np.isnan(raw).any(axis=1)), where)
    ref = mp_steady_state(3, edges, under, dps=400, floats=False)
    again = mp_steady_state(3, edges, under, dps=800, floats=False)
    with mpmath.workdps(60):                                         # p = (1, 1e-400, 1e-600)
        assert all(abs(a - b) <= mpmath.mpf("1e-30") * b for a, b in zip(again, ref))
    P = plan.steady_state(batch, threads=2)
    for r in where:
        assert P[r, 0] == pytest.approx(float(ref[0]), rel=1e-15)
        assert (P[r, 1:] == 0.0).all()          # below the float64 range: rounded to zero
    for r in np.setdiff1d(np.arange(77), where)[:6]:
        assert max_rel_err(P[r], mp_steady_state(3, edges, batch[r], floats=False)) <= 1e-14


# ----------------------------------------------------------------- zero rates

@needs_c
def test_a_zero_rate_in_one_lane_is_refused_with_its_row():
    edges = random_scheme(30, 90, 5)
    rates = log_uniform(np.random.default_rng(5), (40, 90), 1e-3, 1e3)
    rates[21, 37] = 0.0
    for groups in (1, 2, 4):
        plan = EliminationPlan(30, edges)
        plan.groups = groups
        with pytest.raises(EvaluationError, match=r"row 21: rate of edge 37 "):
            plan.steady_state(rates)


def test_zero_rates_in_some_rows_only_are_absent_edges():
    # Through the public call on the looped path: three edges carry an input
    # concentration; rows where one of them is zero are solved on the graph
    # without that edge, the others as usual. Reference: mpmath LU solve of the
    # Laplacian with that rate zero.
    from treeflux.compiler import Scheme

    n = 14
    edges = random_scheme(n, 45, 6)
    gated = (3, 17, 30)
    s = Scheme(name="gated")
    for e, (i, j) in enumerate(edges):
        s.add_parameter(f"k{e}")
        s.add_edge(f"s{i}", f"s{j}", f"k{e}*c{e}" if e in gated else f"k{e}")
    for e in gated:
        s.add_input(f"c{e}")
    m = compile_scheme(s, method="numeric", backend="python")
    col = {name: k for k, name in enumerate(m.symbols)}
    rng = np.random.default_rng(6)
    X = log_uniform(rng, (40, len(m.symbols)), 1e-3, 1e3)
    zero_rows = rng.choice(40, size=7, replace=False)
    for r in zero_rows:
        X[r, col[f"c{int(rng.choice(gated))}"]] = 0.0
    P = m.steady_state(X)
    pos = {name: k for k, name in enumerate(m.states)}
    for r in list(zero_rows) + [r for r in range(40) if r not in zero_rows][:4]:
        rates = [X[r, col[f"k{e}"]] * (X[r, col[f"c{e}"]] if e in gated else 1.0) for e in range(len(edges))]
        ref = mp_steady_state(n, edges, rates, floats=False)
        ours = [P[r, pos[f"s{i}"]] for i in range(n)]
        assert max_rel_err(ours, ref) <= 1e-13, r


# ----------------------------------------------------------------- accuracy

@pytest.mark.parametrize("seed,lo,hi", [(7, 1e-8, 1e8), (8, 1e-100, 1e100)])
def test_random_200_state_schemes_against_mpmath(seed, lo, hi):
    # Entrywise relative error against an mpmath LU solve (40 digits for
    # [1e-8, 1e8]; 500 for [1e-100, 1e100], where the singularity tolerance of
    # mpmath's LU needs the precision to cover the spread of the rates), on
    # entries the reference has inside the float64 normal range. O'Cinneide,
    # Numer. Math. 65 (1993) 109-120: no subtraction, so ~n·u per entry.
    edges = random_scheme(200, 600, seed)
    rng = np.random.default_rng(seed)
    rates = log_uniform(rng, (19, 600), lo, hi)
    dps = 40 if hi < 1e10 else 500
    for backend in ("c", "numpy") if numeric._library() is not None else ("numpy",):
        P = EliminationPlan(200, edges, backend=backend).steady_state(rates, threads=2)
        for r in (0, 13) if hi < 1e10 else (13,):        # a 500-digit solve takes half a minute
            ref = mp_steady_state(200, edges, rates[r], dps=dps, floats=False)
            keep = [i for i in range(200) if ref[i] > mpmath.mpf("1e-300")]
            assert len(keep) > 100
            assert max_rel_err(P[r, keep], [ref[i] for i in keep]) <= 1e-13


# ----------------------------------------------------------------- building

@pytest.mark.skipif(shutil.which("gcc") is None, reason="gcc is not installed")
def test_kernel_builds_with_plain_gcc_and_agrees(monkeypatch):
    # gcc without -march=native (generic x86-64 vectors, no FMA) builds the same
    # source; its results agree to rounding with the tuned build.
    from treeflux.runtime.cache import shared_library
    import ctypes

    path = shared_library(numeric.kernel_source(), flags=("-O2",), name="gth_kernel_plain")
    lib = ctypes.CDLL(str(path))
    lib.gth_version.restype = ctypes.c_int64
    assert lib.gth_version() == numeric.TAPE_VERSION
    fn = lib.gth_solve
    fn.restype = ctypes.c_int64
    fn.argtypes = [ctypes.POINTER(numeric._Tape), ctypes.c_void_p, ctypes.c_void_p,
                   ctypes.c_int64, ctypes.c_int64, ctypes.c_int64, ctypes.c_void_p]
    edges = random_scheme(50, 150, 9)
    rates = log_uniform(np.random.default_rng(9), (37, 150), 1e-6, 1e6)
    ref = EliminationPlan(50, edges, backend="numpy").steady_state(rates)
    plan = EliminationPlan(50, edges)
    monkeypatch.setattr(numeric, "_library", lambda: fn)
    for groups in (1, 2, 4):
        np.testing.assert_allclose(solve(plan, rates, groups), ref, rtol=1e-13, atol=0)
