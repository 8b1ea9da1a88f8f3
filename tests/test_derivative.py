"""Tests of derivative generation on the IR (treeflux.compiler.simplify.derivative).

References: sympy's symbolic derivative of the same closed form (``ir.to_sympy``
then ``sympy.diff``) evaluated exactly at rational points, on schemes with at
most six states; central finite differences on a larger one.
"""

import random
from fractions import Fraction

import numpy as np
import pytest
import sympy

from treeflux.compiler import ir
from treeflux.compiler.frontend import build
from treeflux.compiler.model import Scheme
from treeflux.compiler.simplify import differentiate, input_derivatives, simplify

from .schemes import hypercube_scheme


def binding_scheme() -> Scheme:
    """Receptor with a ligand c: inputs appear linearly and squared."""
    s = Scheme(name="binding")
    for name in ("k1", "k2", "k3", "k4", "k5"):
        s.add_parameter(name)
    s.add_input("c")
    s.add_edge("R", "RL", "k1*c")
    s.add_edge("RL", "R", "k2")
    s.add_edge("RL", "RL2", "k3*c**2")
    s.add_edge("RL2", "RL", "k4 + k2")
    s.add_edge("RL2", "R", "k5")
    s.add_edge("R", "RL2", "k5*c/2")
    return s


def ring_scheme(n: int, seed: int) -> Scheme:
    rng = random.Random(seed)
    s = Scheme(name=f"ring{n}")
    pairs = [(i, (i + 1) % n) for i in range(n)] + [((i + 1) % n, i) for i in range(n)]
    for _ in range(2):
        i, j = rng.sample(range(n), 2)
        if (i, j) not in pairs:
            pairs.append((i, j))
    for e, (i, j) in enumerate(pairs):
        s.add_edge(f"x{i}", f"x{j}", f"r{e}")
    return s


def front(method, scheme, **kw):
    fn, _ = build(scheme, method=method, **kw)
    return fn


def rational_point(n, seed):
    rng = random.Random(seed)
    return [Fraction(rng.randint(1, 60), rng.randint(1, 20)) for _ in range(n)]


def sympy_jacobian(scheme, point):
    """Exact reference: sympy.diff of the unscaled Matrix-Tree closed form."""
    ref = front("trees", scheme, scale=False)
    names = list(scheme.symbols)
    exprs = ir.to_sympy(ref.graph, ref.group("p"), names)
    syms = [sympy.Symbol(s, positive=True) for s in names]
    subs = {x: sympy.Rational(v.numerator, v.denominator) for x, v in zip(syms, point)}
    return [[sympy.diff(e, x).subs(subs) for x in syms] for e in exprs], exprs, syms, subs


def to_fraction(v):
    v = sympy.nsimplify(v) if not v.is_Rational else v
    return Fraction(int(v.p), int(v.q))


SMALL = [("trees", hypercube_scheme(2)), ("elimination", hypercube_scheme(2)),
         ("trees", binding_scheme()), ("elimination", binding_scheme()),
         ("trees", ring_scheme(5, 1)), ("elimination", ring_scheme(6, 2))]


@pytest.mark.parametrize("mode", ["forward", "reverse"])
@pytest.mark.parametrize("method,scheme", SMALL, ids=[f"{m}-{s.name}" for m, s in SMALL])
def test_jacobian_equals_sympy_derivative_exactly(method, scheme, mode):
    fn = simplify(front(method, scheme))
    jac = differentiate(fn, mode=mode)
    ir.verify(jac)
    point = rational_point(fn.n_inputs, 4)
    ref, *_ = sympy_jacobian(scheme, point)
    got = ir.evaluate(jac, jac.group("jac"), point)
    m = fn.n_inputs
    for i, row in enumerate(ref):
        for j, d in enumerate(row):
            # the tree form divides labels by max(ℓ) and treats the max as a constant;
            # homogeneity of p makes that exact, so the match is exact too
            assert got[i * m + j] == to_fraction(d), (i, j)
    # the values are untouched and still subtraction-free
    assert ir.evaluate(jac, jac.group("p"), point) == ir.evaluate(fn, fn.group("p"), point)
    assert ir.subtractive_nodes(jac, groups=("p",)) == []


def test_every_mode_and_sign_option_gives_the_same_jacobian():
    fn = simplify(front("elimination", ring_scheme(5, 3)))
    point = rational_point(fn.n_inputs, 8)
    results = []
    for mode in ("auto", "forward", "reverse"):
        for signs in ("merge", "split"):
            jac = differentiate(fn, mode=mode, signs=signs)
            results.append(ir.evaluate(jac, jac.group("jac"), point))
    assert all(r == results[0] for r in results)


@pytest.mark.parametrize("mode", ["forward", "reverse"])
def test_log_derivative_is_x_times_derivative(mode):
    fn = simplify(front("trees", binding_scheme()))
    plain = differentiate(fn, mode=mode)
    logd = differentiate(fn, mode=mode, log=True)
    point = rational_point(fn.n_inputs, 5)
    a = ir.evaluate(plain, plain.group("jac"), point)
    b = ir.evaluate(logd, logd.group("jac"), point)
    m = fn.n_inputs
    assert b == [a[k] * point[k % m] for k in range(len(a))]
    # p sums to 1, so every column of the Jacobian sums to 0
    n = len(fn.group("p"))
    assert all(sum(b[i * m + j] for i in range(n)) == 0 for j in range(m))


def test_wrt_selects_columns_in_the_given_order():
    fn = simplify(front("elimination", binding_scheme()))
    full = differentiate(fn)
    part = differentiate(fn, wrt=[5, 0])
    point = rational_point(fn.n_inputs, 6)
    a = ir.evaluate(full, full.group("jac"), point)
    b = ir.evaluate(part, part.group("jac"), point)
    m = fn.n_inputs
    assert b == [a[i * m + j] for i in range(3) for j in (5, 0)]


def test_observable_gradient_against_sympy():
    scheme = binding_scheme()
    fn = simplify(front("elimination", scheme))
    g = fn.graph
    p = fn.group("p")
    # bound fraction: one site for RL, two for RL2 (weights 1/2 and 1)
    fn.add_group("obs", [g.add(g.mul(g.const(Fraction(1, 2)), p[1]), p[2])])
    grad = differentiate(fn, group="obs")
    assert "obs_jac" in grad.groups
    point = rational_point(fn.n_inputs, 12)
    _, exprs, syms, subs = sympy_jacobian(scheme, point)
    f = sympy.Rational(1, 2) * exprs[1] + exprs[2]
    ref = [to_fraction(sympy.diff(f, x).subs(subs)) for x in syms]
    assert ir.evaluate(grad, grad.group("obs_jac"), point) == ref


def test_input_derivatives_first_and_second_against_sympy():
    scheme = binding_scheme()
    fn = simplify(front("trees", scheme))
    g = fn.graph
    p = fn.group("p")
    fn.add_group("obs", [g.add(p[1], p[2])])
    c = list(scheme.symbols).index("c")
    out = input_derivatives(fn, input=c, order=2)
    ir.verify(out)
    point = rational_point(fn.n_inputs, 21)
    _, exprs, syms, subs = sympy_jacobian(scheme, point)
    x = syms[c]
    d1 = [to_fraction(sympy.diff(e, x).subs(subs)) for e in exprs]
    d2 = [to_fraction(sympy.diff(e, x, 2).subs(subs)) for e in exprs]
    assert ir.evaluate(out, out.group("d1"), point) == d1
    assert ir.evaluate(out, out.group("d2"), point) == d2
    assert ir.evaluate(out, out.group("obs_d1"), point) == [d1[1] + d1[2]]
    assert ir.evaluate(out, out.group("obs_d2"), point) == [d2[1] + d2[2]]


def test_derivatives_through_exp_log_sqrt_in_mpmath():
    import mpmath
    s = Scheme(name="thermal")
    s.add_edge("A", "B", "k1*exp(-u/2)")
    s.add_edge("B", "A", "k2*sqrt(u)")
    s.add_edge("B", "C", "k3*log(1 + u)")
    s.add_edge("C", "A", "k4*u**(3/2)")
    s.add_edge("A", "C", "k4")
    fn = simplify(front("elimination", s))
    jac = differentiate(fn)
    names = list(s.symbols)
    vals = ["0.7", "1.9", "0.3", "2.5", "1.1"]
    with mpmath.workdps(50):   # inputs and every operation on them to 50 digits
        point = [mpmath.mpf(v) for v in vals]
        got = ir.evaluate(jac, jac.group("jac"), point, "mpmath")
    ref_fn = front("trees", s, scale=False)
    exprs = ir.to_sympy(ref_fn.graph, ref_fn.group("p"), names)
    syms = [sympy.Symbol(n, positive=True) for n in names]
    subs = {x: sympy.Rational(v) for x, v in zip(syms, vals)}
    m = len(names)
    for i, e in enumerate(exprs):
        for j, x in enumerate(syms):
            # reference: sympy's derivative evaluated to 40 digits
            ref = sympy.diff(e, x).subs(subs).evalf(40)
            with mpmath.workdps(50):
                err = abs(got[i * m + j] - mpmath.mpf(str(ref)))
                assert err <= mpmath.mpf(10) ** -30 * (1 + abs(got[i * m + j]))


def test_q4_jacobian_against_central_differences():
    scheme = hypercube_scheme(4)   # 16 states, 64 symbols: too large for a sympy reference
    fn = simplify(front("elimination", scheme))
    jac = differentiate(fn, mode="reverse")
    rng = np.random.default_rng(0)
    m = fn.n_inputs
    x = 10.0 ** rng.uniform(-1, 1, m)
    # h = 1e-6 relative: truncation error of the central difference is O(h²)·|p'''|
    # ≈ 1e-12 and rounding ≈ ε·|p|/h ≈ 1e-16/1e-6 = 1e-10 (p ≤ 1, x ≈ 0.1…10), so
    # 1e-7 absolute plus 1e-5 relative leaves a wide margin for both.
    h = 1e-6 * x
    cols_plus = np.tile(x, (m, 1)) + np.diag(h)
    cols_minus = np.tile(x, (m, 1)) - np.diag(h)
    batch = np.vstack([cols_plus, cols_minus])          # (2m, m): every perturbation at once
    p = np.array(ir.evaluate(fn, fn.group("p"), list(batch.T), "numpy"))  # (16, 2m)
    fd = (p[:, :m] - p[:, m:]) / (2 * h)
    got = np.array(ir.evaluate(jac, jac.group("jac"), list(x), "numpy"), dtype=float).reshape(16, m)
    assert np.allclose(got, fd, rtol=1e-5, atol=1e-7)
    assert np.abs(got).max() > 1e-3   # not trivially zero


def test_bad_requests_are_refused():
    fn = simplify(front("trees", hypercube_scheme(2)))
    with pytest.raises(ValueError, match="no output group 'obs'"):
        differentiate(fn, group="obs")
    with pytest.raises(ValueError, match="wrt column 99 out of range"):
        differentiate(fn, wrt=[99])
    with pytest.raises(ValueError, match="unknown differentiation mode 'sideways'"):
        differentiate(fn, mode="sideways")
    with pytest.raises(ValueError, match="input column 8 out of range"):
        input_derivatives(fn, input=8)
    with pytest.raises(ValueError, match="derivative order must be an integer"):
        input_derivatives(fn, input=0, order=0)


def test_basis_jacobian_of_a_scheme_with_two_terminal_components():
    s = Scheme(name="split")
    for a, b, lab in [("T", "A", "a"), ("T", "C", "b"), ("A", "B", "c"), ("B", "A", "d"),
                      ("C", "D", "e"), ("D", "C", "f"), ("C", "E", "g"), ("E", "D", "h")]:
        s.add_edge(a, b, lab)
    fn = simplify(front("trees", s))
    jac = differentiate(fn, group="basis")
    point = rational_point(fn.n_inputs, 30)
    ref_fn = front("trees", s, scale=False)
    names = list(s.symbols)
    exprs = ir.to_sympy(ref_fn.graph, ref_fn.group("basis"), names)
    syms = [sympy.Symbol(n, positive=True) for n in names]
    subs = {x: sympy.Rational(v.numerator, v.denominator) for x, v in zip(syms, point)}
    ref = [to_fraction(sympy.diff(e, x).subs(subs)) for e in exprs for x in syms]
    # sympy.diff of the unscaled closed form is the reference
    assert ir.evaluate(jac, jac.group("jac"), point) == ref
    assert len(jac.group("jac")) == 2 * 6 * len(names)
