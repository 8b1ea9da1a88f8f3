"""Resource guards before work: planning counts without building the tape and
stops at its budget; tree counts and detailed balance stay bounded; requests
too large for the machine are refused with the estimate."""

import math
import random

import numpy as np
import pytest

from treeflux.compiler import Scheme
from treeflux.compiler.errors import TooLargeError
from treeflux.compiler.pipeline import MAX_NUMERIC_FLOPS, available_memory, plan
from treeflux.compiler.profiler import profile
from treeflux.compiler.structure import (balanced_at_random_points, detailed_balance,
                                         estimate_tree_counts, tree_counts)
from treeflux.runtime.errors import EvaluationError
from treeflux.runtime.numeric import EliminationPlan, elimination_cost, elimination_order

from .schemes import hypercube, lattice


def sparse_random_graph(n, out_degree, seed):
    """n states, `out_degree` random targets each (plus a ring edge): the fill explodes."""
    rng = random.Random(seed)
    edges = set()
    for i in range(n):
        edges.add((i, (i + 1) % n))
        targets = set()
        while len(targets) < out_degree:
            j = rng.randrange(n)
            if j != i:
                targets.add(j)
        edges.update((i, j) for j in targets)
    return n, sorted(edges)


def rate_scheme(n, edges, rate=lambda e: f"k{e}"):
    s = Scheme()
    for e, (i, j) in enumerate(edges):
        s.add_edge(f"s{i}", f"s{j}", rate(e))
    return s


# ------------------------------------------------------------------ elimination cost

@pytest.mark.parametrize("case", ["lattice", "q4", "q5", "random"])
def test_cost_counted_while_ordering_equals_the_built_tape(case):
    graphs = {"lattice": lambda: lattice(6, 7), "q4": lambda: hypercube(4), "q5": lambda: hypercube(5),
              "random": lambda: sparse_random_graph(40, 3, 7)}
    n, edges = graphs[case]()
    cost = elimination_cost(n, edges)
    tape = EliminationPlan(n, edges)
    assert cost.complete and cost.order == tape.order == elimination_order(n, edges)
    assert (cost.flops, cost.fill) == (tape.flops, tape.fill)
    assert cost.updates == tape._tape["upd"].shape[0]


def test_cost_stops_at_its_budget_with_a_lower_bound():
    n, edges = sparse_random_graph(300, 8, 1)
    full = elimination_cost(n, edges)
    cut = elimination_cost(n, edges, budget=full.flops // 10)
    assert not cut.complete and cut.order is None
    assert full.flops // 10 < cut.flops <= full.flops
    assert cut.updates <= full.updates and cut.tape_bytes <= full.tape_bytes


def test_plan_builds_no_tape():
    n, edges = lattice(40, 40)
    s = rate_scheme(n, edges, rate=lambda e: "a" if e % 2 else "b*c")
    p = plan(s, "numeric")
    assert p.method == "numeric" and p._numeric is None       # nothing built yet
    assert p.reasons["elimination_flops"] == p.numeric.flops   # the tape, on demand, agrees
    assert p.numeric.order == p.order


def test_two_thousand_state_random_graph_is_refused_with_the_estimate():
    n, edges = sparse_random_graph(2000, 8, 3)
    s = rate_scheme(n, edges)
    with pytest.raises(TooLargeError, match=r"more than [\d,]+ flops per parameter set"):
        plan(s, "numeric")
    prof = profile(s)                          # profiled: structure plus the refusal of auto
    assert prof["method"] is None and "flops per parameter set" in prof["refused"]
    assert f"limited to {MAX_NUMERIC_FLOPS:,}" in prof["refused"]
    assert prof["strongly_connected"] is True and prof["trees"] is None


def test_balanced_big_scheme_refusal_names_equilibrium():
    # a 1,000-state random graph made reversible with one rate k: balanced
    n, edges = sparse_random_graph(1000, 4, 5)
    both = sorted(set(edges) | {(j, i) for i, j in edges})
    s = rate_scheme(n, both, rate=lambda e: "k")
    with pytest.raises(TooLargeError, match="detailed balance holds, so method='equilibrium'"):
        plan(s, "numeric")


# ------------------------------------------------------------------ tree counts

@pytest.mark.parametrize("n", [3, 6, 12, 30])
def test_tree_estimate_matches_cayley(n):
    # Cayley's formula: the complete digraph has n^(n-2) in-trees per root.
    edges = [(i, j) for i in range(n) for j in range(n) if i != j]
    est = estimate_tree_counts(n, edges)
    assert all(math.isclose(c, float(n) ** (n - 2), rel_tol=1e-9) for c in est)


def test_tree_estimate_matches_exact_counts():
    n, edges = hypercube(4)
    assert all(math.isclose(c, 42_467_328, rel_tol=1e-9) for c in estimate_tree_counts(n, edges))  # OEIS A091664
    for seed in range(5):
        n, edges = sparse_random_graph(25, 2, seed)
        exact = tree_counts(n, edges)
        est = estimate_tree_counts(n, edges)
        assert all(math.isclose(a, float(b), rel_tol=1e-8) for a, b in zip(est, exact))
    assert estimate_tree_counts(3, [(0, 1), (0, 2)]) == [0.0, 0.0, 0.0]    # two closed classes
    logs = estimate_tree_counts(n, edges, log10=True)
    assert all(abs(a - math.log10(b)) < 1e-8 for a, b in zip(logs, exact) if b)


def test_exact_counts_skipped_beyond_their_budget_with_a_reason():
    n, edges = sparse_random_graph(400, 8, 2)
    prof = profile(rate_scheme(n, edges))
    assert prof["trees"] is None and "exact tree counts skipped" in prof["trees_note"]
    mantissa, exponent = prof["trees_estimate"]["s0"].split("e")
    # Reference: Tutte's directed Matrix-Tree theorem — in-trees rooted at state 0 (named
    # s0) number det of the out-degree Laplacian with row and column 0 removed; its
    # log|det| by numpy's LU (slogdet): only the magnitude is compared, float64 suffices.
    L = np.zeros((n, n))
    for i, j in edges:
        L[i, j] -= 1.0
        L[i, i] += 1.0
    sign, logdet = np.linalg.slogdet(L[1:, 1:])
    assert sign > 0
    shown = math.log10(float(mantissa)) + int(exponent)
    assert abs(shown - logdet / math.log(10)) < 0.01                # 3 significant digits shown
    assert int(exponent) > 300                                        # beyond float64: shown by its log


# ------------------------------------------------------------------ detailed balance

def test_long_chain_balances_without_symbolic_work():
    n = 5000
    edges = [(i, i + 1) for i in range(n - 1)] + [(i + 1, i) for i in range(n - 1)]
    r = detailed_balance(rate_scheme(n, edges, rate=lambda e: "kf" if e < n - 1 else "kb"))
    assert r["verdict"] is True and "without cycles" in r["reason"]


def test_many_cycles_tested_at_random_points_modulo_a_prime():
    # 30x30 lattice, 841 basis cycles: beyond the symbolic limit. Uniform drift a/b
    # along rows is balanced (p ∝ (a/b)^column; common practice), a drift that
    # differs between rows is not.
    n, edges = lattice(30, 30)

    def rate(e, odd="a"):
        i, j = edges[e]
        if j == i + 1:
            return odd if (i // 30) % 2 else "a"
        return "b" if j == i - 1 else "c"
    balanced = detailed_balance(rate_scheme(n, edges, rate))
    assert balanced["verdict"] is True and "random points" in balanced["reason"]
    driven = rate_scheme(n, edges, lambda e: rate(e, odd="a*e"))
    assert detailed_balance(driven)["verdict"] == "conditional"
    assert balanced_at_random_points(driven) == "conditional"


def test_random_point_test_agrees_with_sympy_on_small_rings():
    # A ring with k1*k2*k3 = m1*m2*m3 built in: balanced; any other: conditional.
    s = Scheme()
    for a, b, f, r in [("A", "B", "k1", "m1"), ("B", "C", "k2", "m2"), ("C", "A", "m1*m2/k1/k2", "1")]:
        s.add_edge(a, b, f)
        s.add_edge(b, a, r)
    assert detailed_balance(s)["verdict"] is True and balanced_at_random_points(s) is True
    t = Scheme()
    for a, b, f, r in [("A", "B", "k1", "m1"), ("B", "C", "k2", "m2"), ("C", "A", "k3", "m3")]:
        t.add_edge(a, b, f)
        t.add_edge(b, a, r)
    assert detailed_balance(t)["verdict"] == "conditional" == balanced_at_random_points(t)


# ------------------------------------------------------------------ requests

def test_available_memory_is_known_here():
    avail = available_memory()
    assert isinstance(avail, int) and avail > 0


def test_fit_refuses_a_start_count_beyond_the_time_budget():
    from treeflux.compiler import compile_scheme
    from treeflux.runtime.fitting import fit
    s = Scheme()
    s.add_parameter("kon", value=1.0, min=0.01, max=100.0)
    s.add_parameter("koff", value=1.0, min=0.01, max=100.0)
    s.add_input("L", value=1.0)
    s.add_edge("R", "RL", "kon*L")
    s.add_edge("RL", "R", "koff")
    m = compile_scheme(s, cache=False)
    data = {"L": np.array([0.1, 1.0, 10.0]), "RL": np.array([0.09, 0.5, 0.91])}
    with pytest.raises(EvaluationError, match=r"1,000,000 starts would take about .* time budget of 0 s"):
        fit(m, data, starts=1_000_000, max_seconds=1e-6)
    r = fit(m, data, starts=2, max_seconds=600)
    # one-site binding: RL = L/(L + Kd), Kd = koff/kon ≈ 1 from these data (common practice)
    assert abs(r["parameters"]["koff"] / r["parameters"]["kon"] - 1.0) < 0.1
