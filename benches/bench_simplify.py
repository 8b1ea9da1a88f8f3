"""Benchmarks of the simplifier and of derivative generation.

Run: ``cd /work/main && python -m pytest benches/bench_simplify.py -q -s``
(``-s`` shows the summary lines; the figures also land in the benchmark's
``extra_info``). Every goal is a ratio measured in the same run:

- Q3 tree form: operations after :func:`simplify` versus what ``sympy.cse``
  leaves on the same tree-sum expressions (goal ≤ 1/3), and the time of both;
- Q3 tree and Q4 elimination: time of :func:`simplify` against the time of
  the front end that produced the Function; op counts next to the flop
  figures of straight-line elimination (TECH-NOTES: ≈145 Q3, ≈645 Q4);
- gradient of one observable versus the value (op counts and numpy
  evaluation time; goal ≤ 4×), and the full Jacobian per state row.
"""

from __future__ import annotations

import statistics
import time
from fractions import Fraction

import numpy as np
import pytest
import sympy

from treeflux.compiler import ir
from treeflux.compiler.frontend import build
from treeflux.compiler.model import Scheme
from treeflux.compiler.simplify import differentiate, simplify


def hypercube(d: int) -> Scheme:
    s = Scheme(name=f"q{d}")
    for i in range(2 ** d):
        for b in range(d):
            j = i ^ (1 << b)
            s.add_edge(f"s{i}", f"s{j}", f"k{i}_{j}")
    return s


def median_time(f, repeat: int = 5) -> float:
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        f()
        times.append(time.perf_counter() - t)
    return statistics.median(times)


# ----------------------------------------------------------------- sympy op count

def _pow_cost(e: int) -> int:
    """Multiplications for x**e by binary powering (e ≥ 1)."""
    return e.bit_length() - 1 + bin(e).count("1") - 1


def sympy_ops(expr) -> int:
    """Arithmetic operations to evaluate a sympy expression tree once, counted the
    way :func:`treeflux.compiler.ir.count_ops` counts the IR: an n-term sum is
    n−1 additions (a negative term is a subtraction, also one), an n-factor
    product n−1 multiplications with every factor of negative exponent moved to
    one denominator (one division), integer powers by binary powering, any
    other function one operation. Symbols and numbers cost nothing."""
    total = 0
    stack = [(expr, False)]
    while stack:
        e, in_mul = stack.pop()
        if e.is_Atom:
            continue
        if e.is_Add:
            total += len(e.args) - 1
            stack.extend((a, False) for a in e.args)
        elif e.is_Mul:
            num, den = [], []
            for a in e.args:
                if a.is_Pow and a.exp.is_Integer and a.exp < 0:
                    den.append(a)
                elif a == -1:
                    total += 1  # a negation (folded into a subtraction by any printer)
                else:
                    num.append(a)
            total += max(len(num) - 1, 0) + max(len(den) - 1, 0) + (1 if den else 0)
            stack.extend((a, True) for a in num + den)
        elif e.is_Pow:
            if e.exp.is_Integer:
                k = abs(int(e.exp))
                total += _pow_cost(k) + (0 if in_mul or e.exp > 0 else 1)
            else:
                total += 1
            stack.append((e.base, False))
        else:
            total += 1
            stack.extend((a, False) for a in e.args)
    return total


def sympy_cse_ops(exprs) -> tuple[int, float]:
    t = time.perf_counter()
    replacements, reduced = sympy.cse(exprs)
    elapsed = time.perf_counter() - t
    return sum(sympy_ops(r) for _, r in replacements) + sum(sympy_ops(r) for r in reduced), elapsed


def test_sympy_counter_on_small_expressions():
    a, b, c = sympy.symbols("a b c", positive=True)
    assert sympy_ops(a * b + c) == 2
    assert sympy_ops(a / (b * c)) == 2          # one multiplication, one division
    assert sympy_ops(a ** 5) == 3               # a², a⁴, a⁴·a
    assert sympy_ops(a - b) == 2                # a + (−1)·b: a negation and an addition


# ----------------------------------------------------------------- simplification

def test_q3_tree_form_against_sympy_cse(benchmark):
    scheme = hypercube(3)
    fn, _ = build(scheme, method="trees", scale=False)
    exprs = ir.to_sympy(fn.graph, fn.group("p"), list(scheme.symbols))
    theirs, t_cse = sympy_cse_ops(exprs)
    out = benchmark.pedantic(simplify, args=(fn,), rounds=3, iterations=1)
    ours = ir.count_ops(out.graph, out.group("p"))
    scaled_fn, _ = build(scheme, method="trees")
    scaled = ir.count_ops(simplify(scaled_fn).graph, simplify(scaled_fn).group("p"))
    t_ours = benchmark.stats.stats.median
    info = {"ops_simplified": ours["total"], "ops_simplified_scaled": scaled["total"],
            "ops_sympy_cse": theirs, "op_ratio": ours["total"] / theirs,
            "time_simplify_s": t_ours, "time_sympy_cse_s": t_cse,
            "time_ratio": t_ours / t_cse, "counts": ours, "counts_scaled": scaled}
    benchmark.extra_info.update(info)
    print("\nQ3 trees:", info)
    assert ours["total"] * 3 <= theirs


@pytest.mark.parametrize("method,d", [("trees", 3), ("elimination", 3), ("elimination", 4)])
def test_simplify_time_and_size(benchmark, method, d):
    scheme = hypercube(d)
    t_front = median_time(lambda: build(scheme, method=method), repeat=3)
    fn, _ = build(scheme, method=method)
    report = []
    simplify(fn, report=report)
    out = benchmark.pedantic(simplify, args=(fn,), rounds=3, iterations=1)
    t = benchmark.stats.stats.median
    counts = ir.count_ops(out.graph, out.group("p"))
    reference = {3: 145, 4: 645}[d]   # TECH-NOTES: straight-line elimination flops
    info = {"ops_front_end": report[0]["before"]["total"], "ops": counts["total"], "counts": counts,
            "elimination_flops_reference": reference, "ratio_to_reference": counts["total"] / reference,
            "time_simplify_s": t, "time_front_end_s": t_front, "time_ratio_to_front_end": t / t_front,
            "per_pass": {r["pass"]: r["after"]["total"] for r in report}}
    benchmark.extra_info.update(info)
    print(f"\n{method} Q{d}:", info)


# ----------------------------------------------------------------- derivatives

def _with_observable(fn):
    g = fn.graph
    p = fn.group("p")
    # an observable: half of the states, weighted like a two-site occupancy
    fn.add_group("obs", [g.add(*[g.mul(g.const(Fraction(k % 3 + 1, 2)), v) for k, v in enumerate(p[: len(p) // 2])])])
    return fn


@pytest.mark.parametrize("method,d", [("trees", 3), ("elimination", 3), ("elimination", 4)])
def test_gradient_and_jacobian_cost(benchmark, method, d):
    fn, _ = build(hypercube(d), method=method)
    fn = _with_observable(simplify(fn))
    grad = differentiate(fn, group="obs")
    jac = differentiate(fn, group="p")
    value_ops = ir.count_ops(grad.graph, grad.group("obs"))["total"]
    grad_ops = ir.count_ops(grad.graph, grad.group("obs") + grad.group("obs_jac"))["total"]
    p_ops = ir.count_ops(jac.graph, jac.group("p"))["total"]
    jac_ops = ir.count_ops(jac.graph, jac.group("p") + jac.group("jac"))["total"]
    n = len(fn.group("p"))

    rng = np.random.default_rng(1)
    batch = 4096
    x = list(10.0 ** rng.uniform(-3, 3, (fn.n_inputs, batch)))
    roots_value = grad.group("obs")
    roots_grad = grad.group("obs") + grad.group("obs_jac")
    benchmark.pedantic(lambda: ir.evaluate(grad, roots_grad, x, "numpy"), rounds=3, iterations=1)
    # the ratio from one interleaved measurement of both, after the warm-up above
    t_value = median_time(lambda: ir.evaluate(grad, roots_value, x, "numpy"))
    t_grad = median_time(lambda: ir.evaluate(grad, roots_grad, x, "numpy"))
    t_p = median_time(lambda: ir.evaluate(jac, jac.group("p"), x, "numpy"), repeat=3)
    t_jac = median_time(lambda: ir.evaluate(jac, jac.group("p") + jac.group("jac"), x, "numpy"), repeat=3)
    info = {"value_ops": value_ops, "value_and_gradient_ops": grad_ops, "gradient_op_ratio": grad_ops / value_ops,
            "gradient_time_ratio": t_grad / t_value,
            "p_ops": p_ops, "p_and_jacobian_ops": jac_ops,
            "jacobian_ops_per_row_over_value": (jac_ops - p_ops) / n / p_ops,
            "jacobian_time_per_row_over_value": (t_jac - t_p) / n / t_p}
    benchmark.extra_info.update(info)
    print(f"\n{method} Q{d} derivatives:", info)
    assert grad_ops <= 4 * value_ops
