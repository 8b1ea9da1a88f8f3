"""Tests of the looped subtraction-free elimination (treeflux.runtime.numeric)."""

import mpmath
import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as sla

import treeflux.runtime.numeric as numeric
from treeflux.runtime.errors import EvaluationError
from treeflux.runtime.numeric import EliminationPlan, elimination_order

from . import schemes
from .schemes import lattice, mp_steady_state


# ----------------------------------------------------------------- helpers

def random_scheme(n, m, seed):
    """A random strongly connected graph: a Hamiltonian cycle plus random chords."""
    rng = np.random.default_rng(seed)
    perm = rng.permutation(n)
    edges = {(int(perm[i]), int(perm[(i + 1) % n])) for i in range(n)}
    while len(edges) < m:
        i, j = rng.integers(n, size=2)
        if i != j:
            edges.add((int(i), int(j)))
    return sorted(edges)


def log_uniform(rng, shape, lo, hi):
    return 10.0 ** rng.uniform(np.log10(lo), np.log10(hi), size=shape)


def hypercube(d):
    """Independent two-state sites: bit k flips with its own rate each way;
    also the site of each edge and whether it turns the site on."""
    n, edges = schemes.hypercube(d)
    site = np.array([(i ^ j).bit_length() - 1 for i, j in edges])
    up = np.array([j > i for i, j in edges])
    return n, edges, site, up


def max_rel_err(values, reference):
    with mpmath.workdps(50):
        return max(float(abs(mpmath.mpf(float(v)) - r) / abs(r)) for v, r in zip(values, reference))


# ---------------------------------------------------------------- accuracy

@pytest.mark.parametrize("n,m,seed", [(12, 36, 1), (16, 48, 2), (50, 150, 3)])
def test_matches_mpmath_on_stiff_random_graphs(n, m, seed):
    # Reference: mpmath 50-digit LU solve of the Laplacian. The 1e-12 bound on the
    # *entrywise relative* error holds because GTH elimination never subtracts:
    # O'Cinneide, Numer. Math. 65 (1993) 109-120 bounds each entry's relative
    # error by a modest multiple of n^2 times the unit roundoff, whatever the
    # conditioning; rates log-uniform over [1e-8, 1e8].
    rng = np.random.default_rng(seed)
    edges = random_scheme(n, m, seed)
    rates = log_uniform(rng, (3, m), 1e-8, 1e8)
    plan = EliminationPlan(n, edges)
    P = plan.steady_state(rates)
    for row in range(3):
        ref = mp_steady_state(n, edges, rates[row], floats=False)
        assert max_rel_err(P[row], ref) <= 1e-12


def test_extreme_rates_stay_finite_and_correct():
    # Rates log-uniform over [1e-100, 1e100]; reference: mpmath LU solve at 700
    # digits (mpmath's exponent range is unbounded; its singularity tolerance is
    # relative to the matrix norm, so the precision must cover the 1e200 spread),
    # checked against a 900-digit solve. Entries are compared where the
    # reference is representable in float64.
    rng = np.random.default_rng(7)
    n, m = 12, 36
    edges = random_scheme(n, m, 7)
    rates = log_uniform(rng, (4, m), 1e-100, 1e100)
    for backend in ("c", "numpy"):
        P = EliminationPlan(n, edges, backend=backend).steady_state(rates)
        assert np.isfinite(P).all()
        for row in range(4):
            ref = mp_steady_state(n, edges, rates[row], dps=700, floats=False)
            assert max_rel_err([float(v) for v in ref], mp_steady_state(n, edges, rates[row], dps=900, floats=False)) < 1e-15
            keep = [i for i in range(n) if ref[i] > mpmath.mpf("1e-290")]
            assert max_rel_err(P[row, keep], [ref[i] for i in keep]) <= 1e-12


def test_overflowing_ratios_are_renormalised():
    # Birth-death chain 0 <-> 1 <-> ... <-> 5 with up rate 1e100 and down rate
    # 1e-100: by detailed balance p_k ∝ (up/down)^k = 1e200^k (textbook
    # birth-death formula, e.g. Norris, Markov Chains, 1997, sect. 3.7). Kept
    # state 0 makes x_5 = 1e1000 without renormalisation.
    n = 6
    edges = [(k, k + 1) for k in range(n - 1)] + [(k + 1, k) for k in range(n - 1)]
    rates = np.array([[1e100] * (n - 1) + [1e-100] * (n - 1)])
    order = [5, 4, 3, 2, 1, 0]
    for backend in ("c", "numpy"):
        p = EliminationPlan(n, edges, order=order, backend=backend).steady_state(rates)[0]
        assert p[5] == pytest.approx(1.0, rel=1e-15)
        assert p[4] == pytest.approx(1e-200, rel=1e-13)
        assert (p[:4] == 0.0).all()          # 1e-400 and below are not representable


def test_product_form_hypercubes():
    # Independent two-state sites: the stationary law is the product of the
    # per-site Bernoulli laws P(site k up) = a_k / (a_k + b_k) (common practice:
    # independent components give a product-form stationary distribution).
    rng = np.random.default_rng(11)
    for d in (4, 6):
        n, edges, site, up = hypercube(d)
        a = log_uniform(rng, (2, d), 1e-6, 1e6)
        b = log_uniform(rng, (2, d), 1e-6, 1e6)
        rates = np.where(up, a[:, site], b[:, site])
        P = EliminationPlan(n, edges).steady_state(rates)
        states = np.arange(n)
        bits = (states[:, None] >> np.arange(d)) & 1
        pu, pd = a / (a + b), b / (a + b)      # not 1 - pu: that subtraction loses digits
        expect = np.prod(np.where(bits[None], pu[:, None, :], pd[:, None, :]), axis=2)
        np.testing.assert_allclose(P, expect, rtol=1e-13, atol=0)


@pytest.mark.parametrize("side", [20, 100])
def test_lattice_matches_scipy_spsolve(side):
    # Reference: scipy.sparse.linalg.spsolve of the Laplacian with one equation
    # replaced by sum(p) = 1; moderate rates keep that reference accurate.
    # side = 100 is the 10,000-state scheme the looped path must handle.
    n, edges = lattice(side, side)
    e = np.array(edges)
    rng = np.random.default_rng(5)
    rates = rng.uniform(0.5, 2.0, size=(2, len(edges)))
    P = EliminationPlan(n, edges).steady_state(rates)
    assert P.shape == (2, n) and (P > 0).all()
    for row in range(2):
        L = sp.coo_matrix((rates[row], (e[:, 1], e[:, 0])), shape=(n, n)).tocsr()
        L = (L - sp.diags(np.asarray(L.sum(axis=0)).ravel())).tolil()
        L[0, :] = 1.0
        rhs = np.zeros(n)
        rhs[0] = 1.0
        ref = sla.spsolve(L.tocsc(), rhs)
        np.testing.assert_allclose(P[row], ref, rtol=1e-10 if side < 50 else 1e-8, atol=0)


def test_transient_states_get_zero():
    # 0 -> 1 <-> 2: state 0 is transient (one terminal component {1, 2});
    # p = (0, b/(a+b), a/(a+b)) for rates a = q(1->2), b = q(2->1) (two-state chain, from memory).
    edges = [(0, 1), (1, 2), (2, 1)]
    rates = np.array([[3.0, 2.0, 5.0]])
    p = EliminationPlan(3, edges).steady_state(rates)[0]
    np.testing.assert_allclose(p, [0.0, 5 / 7, 2 / 7], rtol=1e-15)


def test_single_state():
    p = EliminationPlan(1, []).steady_state(np.zeros((2, 0)))
    assert p.tolist() == [[1.0], [1.0]]


# ----------------------------------------------------------------- backends

def test_c_and_numpy_agree():
    rng = np.random.default_rng(3)
    cases = [(50, random_scheme(50, 150, 9)), (64, hypercube(6)[1]), (36, lattice(6, 6)[1])]
    for n, edges in cases:
        rates = log_uniform(rng, (21, len(edges)), 1e-8, 1e8)
        c = EliminationPlan(n, edges, backend="c")
        assert c.backend == "c"
        a = c.steady_state(rates)
        b = EliminationPlan(n, edges, backend="numpy").steady_state(rates)
        np.testing.assert_allclose(a, b, rtol=1e-14, atol=0)


def test_fallback_without_compiler(monkeypatch):
    monkeypatch.setenv("CC", "/nonexistent/compiler-for-test")
    monkeypatch.setattr(numeric, "_LIBS", {})
    edges = random_scheme(10, 30, 4)
    plan = EliminationPlan(10, edges)
    assert plan.backend == "numpy"
    rates = log_uniform(np.random.default_rng(4), (5, 30), 1e-3, 1e3)
    ref = [mp_steady_state(10, edges, r, floats=False) for r in rates]   # mpmath 50-digit reference
    P = plan.steady_state(rates)
    for row in range(5):
        assert max_rel_err(P[row], ref[row]) <= 1e-13


def test_threads_and_out_buffer_give_identical_rows():
    n, edges, _, _ = hypercube(4)
    rates = log_uniform(np.random.default_rng(8), (50_003, len(edges)), 1e-3, 1e3)
    plan = EliminationPlan(n, edges)
    one = plan.steady_state(rates, threads=1)
    out = np.empty((rates.shape[0], n))
    two = plan.steady_state(rates, threads=2, out=out)
    assert two is out
    assert np.array_equal(one, two)
    np.testing.assert_allclose(one.sum(axis=1), 1.0, rtol=1e-14)


# ----------------------------------------------------------------- refusals

def test_bad_rates_name_row_and_edge():
    edges = random_scheme(8, 20, 1)
    plan = EliminationPlan(8, edges)
    for bad in (0.0, -1.0, np.inf, np.nan):
        for row, edge in ((9, 4), (2, 18)):      # edge 18: outside the 8-edge chunks
            rates = np.ones((12, 20))
            rates[row, edge] = bad
            for backend in ("c", "numpy"):
                with pytest.raises(EvaluationError, match=rf"row {row}: rate of edge {edge}"):
                    EliminationPlan(8, edges, backend=backend).steady_state(rates)
    with pytest.raises(EvaluationError, match=r"shape \(N, 20\)"):
        plan.steady_state(np.ones((3, 19)))
    with pytest.raises(EvaluationError, match="out must be"):
        plan.steady_state(np.ones((3, 20)), out=np.empty((3, 7)))


def test_underflowing_pivot_is_recomputed_in_extended_range():
    # 0 -> 1 at 1e-200, 1 -> 0 at 1e200, 1 -> 2 at 1e-200, 2 -> 0 at 1: eliminating
    # 1 first gives q(0->2) = 1e-200 * 1e-200 / 1e200 = 1e-600, below float64.
    # The kernel flags the set and it is recomputed in extended range; the
    # reference is mpmath at 400 digits (raised until two solves agree).
    edges = [(0, 1), (1, 0), (1, 2), (2, 0)]
    rates = np.ones((3, 4))
    rates[1] = [1e-200, 1e200, 1e-200, 1.0]
    ref = mp_steady_state(3, edges, rates[1], dps=400)
    keep = [i for i in range(3) if ref[i] >= np.finfo(float).tiny]
    again = mp_steady_state(3, edges, rates[1], dps=800)
    assert max_rel_err([ref[i] for i in keep], [again[i] for i in keep]) < 1e-15
    for backend in ("c", "numpy"):
        P = EliminationPlan(3, edges, order=[1, 0, 2], backend=backend).steady_state(rates)
        assert max_rel_err(P[1, keep], [ref[i] for i in keep]) <= 1e-14
        # all rates 1: balance gives p = (1/2, 1/4, 1/4) (flux 0->1 = 1->0 + 1->2 = 2->0)
        assert P[0] == pytest.approx([0.5, 0.25, 0.25], rel=1e-15)


def test_not_strongly_connected_is_refused():
    # Two closed classes {0, 1} and {2, 3}, joined one way only through 4.
    edges = [(0, 1), (1, 0), (2, 3), (3, 2), (4, 0), (4, 2)]
    with pytest.raises(EvaluationError, match="2 terminal components"):
        EliminationPlan(5, edges)
    with pytest.raises(EvaluationError, match="2 terminal components"):
        elimination_order(5, edges)
    with pytest.raises(EvaluationError, match="cannot be reached"):
        EliminationPlan(3, [(0, 1), (1, 2), (2, 1)], order=[1, 2, 0])
    with pytest.raises(EvaluationError, match="self-loop"):
        EliminationPlan(2, [(0, 1), (1, 1)])
    with pytest.raises(EvaluationError, match="duplicate"):
        EliminationPlan(2, [(0, 1), (1, 0), (0, 1)])


# ----------------------------------------------------------------- ordering

def star(leaves):
    return leaves + 1, [(0, k) for k in range(1, leaves + 1)] + [(k, 0) for k in range(1, leaves + 1)]


def test_star_order_and_fill_by_hand():
    # Hand count: a leaf has in = out = {centre}, so eliminating it creates no
    # edge; eliminating the centre first joins every ordered pair of leaves,
    # L(L-1) new edges, and nothing after that adds more.
    L = 5
    n, edges = star(L)
    order = elimination_order(n, edges)
    # Leaves go first (fill 0, degree 2, by index); with one leaf left, centre
    # and leaf tie on fill and degree and the smaller index (0) goes.
    assert order == [1, 2, 3, 4, 0, 5]
    assert EliminationPlan(n, edges).fill == 0
    assert EliminationPlan(n, edges, order=list(range(n))).fill == L * (L - 1)
    kept = elimination_order(n, edges, root=0)
    assert kept[-1] == 0 and sorted(kept) == list(range(n))


def test_cycle_and_path_fill_by_hand():
    # Directed cycle of n states: each elimination joins its predecessor to its
    # successor (one new edge) until two states remain: n - 2 fill edges.
    n = 7
    cycle = [(k, (k + 1) % n) for k in range(n)]
    assert EliminationPlan(n, cycle).fill == n - 2
    # Path 0 <-> 1 <-> 2 <-> 3: eliminating 1 first joins 0 and 2 both ways (2 edges).
    path = [(0, 1), (1, 0), (1, 2), (2, 1), (2, 3), (3, 2)]
    assert EliminationPlan(4, path, order=[1, 0, 2, 3]).fill == 2
    assert EliminationPlan(4, path).fill == 0


def test_two_state_flop_count_by_hand():
    # Order [0, 1]: d_0 = q01 (0 adds), 1/d_0 (1 div), t = q01/d_0 (1 mul), no
    # update (i = j); back-substitution x_0 = x_1 q10 / d_0 (1 mul, 1 div);
    # normalisation: one add, one reciprocal, two products. Total 8.
    plan = EliminationPlan(2, [(0, 1), (1, 0)], order=[0, 1])
    assert plan.flops == 8
    p = plan.steady_state(np.array([[2.0, 6.0]]))[0]
    np.testing.assert_allclose(p, [0.75, 0.25], rtol=1e-15)   # p0/p1 = q10/q01 (from memory)


def test_root_is_never_eliminated_and_order_is_deterministic():
    edges = random_scheme(40, 120, 12)
    for root in (0, 17, 39):
        order = elimination_order(40, edges, root=root)
        assert order[-1] == root
        assert sorted(order) == list(range(40))
        assert order == elimination_order(40, edges, root=root)
    with pytest.raises(EvaluationError, match="outside"):
        elimination_order(40, edges, root=40)


def test_greedy_beats_natural_order_on_lattice():
    # Minimum-fill greedy on a 12x12 grid must create far fewer edges than the
    # row-by-row order (whose fill grows like the bandwidth squared).
    n, edges = lattice(12, 12)
    greedy = EliminationPlan(n, edges)
    natural = EliminationPlan(n, edges, order=list(range(n)))
    assert greedy.fill < natural.fill / 2
    assert greedy.flops < natural.flops / 2
