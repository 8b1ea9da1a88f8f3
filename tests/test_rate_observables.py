"""Observables that are rates: weights as rate expressions, one-way fluxes of
edges, net fluxes of reversible pairs — compiled with derivatives like the
states, evaluated per row on every path, printed by `formula`.

Outside references, each named beside its check: the Briggs-Haldane velocity
(Briggs & Haldane, Biochem. J. 19 (1925) 338); the initial-rate laws of the
ordered and ping-pong bi-bi mechanisms (Segel, Enzyme Kinetics, Wiley 1975,
ch. 9 — written here from memory, in Cleland's kinetic constants, and
re-derived symbolically below so a memory slip cannot pass); the steady
state solved in mpmath at 50 digits; mpmath finite differences for the
derivatives; the cycle flux of a driven ring (T. L. Hill, Free Energy
Transduction in Biology, 1977: every edge of a single cycle carries the same
net flux).
"""

import os
import random
import subprocess
import sys
import textwrap

import mpmath
import numpy as np
import pytest
import sympy

from treeflux.compiler import ModelError, Scheme, compile_scheme, load
from treeflux.compiler import ir
from treeflux.compiler.cli import main
from treeflux.compiler.formula import coefficient_form, shared_form
from treeflux.compiler.frontend import build
from treeflux.compiler.parse import from_data
from treeflux.compiler.pipeline import _observable_nodes
from treeflux.compiler.writer import model_text

from .schemes import mp_steady_state

BACKENDS = ["python", "c", "llvm", "cython"]


# ------------------------------------------------------------------ schemes

def briggs_haldane():
    s = Scheme(name="briggs-haldane")
    for k in ("k_on", "k_off", "k_cat"):
        s.add_parameter(k, value=1.0, min=1e-3, max=1e3)
    s.add_input("S", value=1.0)
    s.add_input("E0", value=1.0)
    s.add_edge("E", "ES", "k_on*S")
    s.add_edge("ES", "E", "k_off + k_cat")
    s.add_observable("v", {"ES": "k_cat*E0"})
    return s


def _bi_bi(name, edges, inputs=("A", "B", "P", "Q")):
    """A two-substrate mechanism: rate constants k1..k8, one edge each."""
    s = Scheme(name=name)
    for k in [f"k{i}" for i in range(1, 9)]:
        s.add_parameter(k, value=1.0)
    for c in inputs:
        s.add_input(c, value=1.0)
    for source, target, rate in edges:
        s.add_edge(source, target, rate)
    return s


def ordered_bi_bi():
    """E + A ⇌ EA, EA + B ⇌ EAB (central complex), EAB → EQ + P, EQ → E + Q."""
    s = _bi_bi("ordered bi-bi", [("E", "EA", "k1*A"), ("EA", "E", "k2"), ("EA", "EAB", "k3*B"),
                                 ("EAB", "EA", "k4"), ("EAB", "EQ", "k5"), ("EQ", "EAB", "k6*P"),
                                 ("EQ", "E", "k7"), ("E", "EQ", "k8*Q")])
    s.add_observable("v", {"flux": "EAB->EQ"})           # per enzyme
    s.add_observable("v_net", {"net_flux": "EAB->EQ"})
    return s


def ping_pong():
    """E + A ⇌ EA → F + P, F + B ⇌ FB → E + Q (modified enzyme F)."""
    s = _bi_bi("ping-pong bi-bi", [("E", "EA", "k1*A"), ("EA", "E", "k2"), ("EA", "F", "k3"),
                                   ("F", "EA", "k4*P"), ("F", "FB", "k5*B"), ("FB", "F", "k6"),
                                   ("FB", "E", "k7"), ("E", "FB", "k8*Q")], ("A", "B", "P", "Q", "E0"))
    s.add_observable("v", {"EA": "k3*E0"})               # velocity, a rate expression
    s.add_observable("v_flux", {"flux": "FB->E"})        # the same per enzyme, at steady state
    return s


def ordered_law(k, A, B, E0=1):
    # Segel 1975 ch. 9 (from memory): v = V1·A·B/(Kia·Kb + Kb·A + Ka·B + A·B)
    k1, k2, k3, k4, k5, k6, k7, k8 = k
    V1 = k5 * k7 / (k5 + k7) * E0
    Ka = k5 * k7 / (k1 * (k5 + k7))
    Kb = k7 * (k4 + k5) / (k3 * (k5 + k7))
    Kia = k2 / k1
    return V1 * A * B / (Kia * Kb + Kb * A + Ka * B + A * B)


def ping_pong_law(k, A, B, E0=1):
    # Segel 1975 ch. 9 (from memory): v = V1·A·B/(Kb·A + Ka·B + A·B), no constant term
    k1, k2, k3, k4, k5, k6, k7, k8 = k
    V1 = k3 * k7 / (k3 + k7) * E0
    Ka = k7 * (k2 + k3) / (k1 * (k3 + k7))
    Kb = k3 * (k6 + k7) / (k5 * (k3 + k7))
    return V1 * A * B / (Kb * A + Ka * B + A * B)


def _rand_values(rng, names, lo=-2, hi=2):
    return {n: 10 ** rng.uniform(lo, hi) for n in names}


def _sympy_velocity(edges, n, state, weight):
    """Independent symbolic steady state (Laplacian solve in SymPy) × weight."""
    L = sympy.zeros(n)
    for i, j, k in edges:
        L[j, i] += k
        L[i, i] -= k
    L[0, :] = sympy.ones(1, n)
    b = sympy.zeros(n, 1)
    b[0] = 1
    return sympy.simplify(L.LUsolve(b)[state] * weight)


def test_textbook_laws_are_what_the_laws_say():
    """The laws above, written from memory, re-derived from the mechanisms by
    an independent SymPy solve (so the numeric checks below test treeflux,
    not a misremembered constant)."""
    k = sympy.symbols("k1:9", positive=True)
    A, B = sympy.symbols("A B", positive=True)
    k1, k2, k3, k4, k5, k6, k7, k8 = k
    ordered = _sympy_velocity([(0, 1, k1 * A), (1, 0, k2), (1, 2, k3 * B), (2, 1, k4), (2, 3, k5), (3, 0, k7)],
                              4, 2, k5)
    assert sympy.simplify(ordered - ordered_law(k, A, B)) == 0
    pp = _sympy_velocity([(0, 1, k1 * A), (1, 0, k2), (1, 2, k3), (2, 3, k5 * B), (3, 2, k6), (3, 0, k7)],
                         4, 1, k3)
    assert sympy.simplify(pp - ping_pong_law(k, A, B)) == 0


# ------------------------------------------------------------------ values

@pytest.mark.parametrize("method", ["trees", "elimination", "numeric"])
def test_briggs_haldane_velocity(method):
    # Briggs & Haldane 1925: v = k_cat·E0·S/(Km + S), Km = (k_off + k_cat)/k_on
    m = compile_scheme(briggs_haldane(), method=method, cache=False)
    rng = random.Random(1)
    rows = [_rand_values(rng, ["k_on", "k_off", "k_cat", "S", "E0"], -3, 3) for _ in range(50)]
    X = {k: np.array([r[k] for r in rows]) for k in rows[0]}
    v = m.observables(X)[:, 0]
    Km = (X["k_off"] + X["k_cat"]) / X["k_on"]
    law = X["k_cat"] * X["E0"] * X["S"] / (Km + X["S"])
    np.testing.assert_allclose(v, law, rtol=1e-13, atol=0)


@pytest.mark.parametrize("method", ["trees", "elimination", "numeric"])
def test_ordered_and_ping_pong_initial_rates(method):
    """Initial-rate conditions (products zero: their binding edges are absent)."""
    rng = random.Random(2)
    for scheme, law, name in ((ordered_bi_bi(), ordered_law, "v"), (ping_pong(), ping_pong_law, "v")):
        m = compile_scheme(scheme, method=method, cache=False)
        rows = [_rand_values(rng, scheme.symbols) for _ in range(40)]
        X = {k: np.array([r[k] for r in rows]) for k in scheme.symbols}
        X["P"] = X["Q"] = np.zeros(40)
        O = m.observables(X)
        k = [X[f"k{i}"] for i in range(1, 9)]
        E0 = X.get("E0", 1.0)
        np.testing.assert_allclose(O[:, m.observable_names.index(name)], law(k, X["A"], X["B"], E0),
                                   rtol=1e-13, atol=0)
        if "v_net" in m.observable_names:  # no reverse flux through EQ->EAB when P = 0
            np.testing.assert_allclose(O[:, 1], O[:, 0], rtol=1e-13, atol=0)
        if "v_flux" in m.observable_names:  # per enzyme, the two product steps carry the same flux
            np.testing.assert_allclose(O[:, 1] * X["E0"], O[:, 0], rtol=1e-13, atol=0)


def test_net_flux_on_a_driven_ring_is_the_cycle_flux():
    """A 4-state ring driven out of balance: every edge carries the cycle flux
    (Hill 1977), checked against the mpmath steady state (50 digits)."""
    s = Scheme(name="ring")
    ring = ["A", "B", "C", "D"]
    for a, b in zip(ring, ring[1:] + ring[:1]):
        s.add_edge(a, b, f"f_{a}{b}")
        s.add_edge(b, a, f"r_{b}{a}")
    for a, b in zip(ring, ring[1:] + ring[:1]):
        s.add_observable(f"J_{a}{b}", {"net_flux": f"{a}->{b}"})
    m = compile_scheme(s, method="elimination", cache=False)
    rng = random.Random(3)
    for _ in range(20):
        vals = _rand_values(rng, s.symbols)
        O = m.observables(vals)[0]
        rates = [vals[e.rate] for e in s.edges]
        idx = {st: i for i, st in enumerate(s.states)}
        with mpmath.workdps(50):
            p = mp_steady_state(4, s.edge_list(), [mpmath.mpf(r) for r in rates], floats=False)
            a, b = idx["A"], idx["B"]
            J = p[a] * mpmath.mpf(vals["f_AB"]) - p[b] * mpmath.mpf(vals["r_BA"])
            scale = [p[idx[x]] * mpmath.mpf(vals[f"f_{x}{y}"]) + p[idx[y]] * mpmath.mpf(vals[f"r_{y}{x}"])
                     for x, y in zip(ring, ring[1:] + ring[:1])]
        # every edge of the ring carries J; a net flux's error is absolute:
        # a few ε·(J+ + J−) of its own edge (p itself is good to a few ulps)
        bound = 16 * np.finfo(float).eps * np.array([float(x) for x in scale])
        assert np.all(np.abs(O - float(J)) <= bound), (O, float(J))


def test_net_flux_under_detailed_balance_is_zero_to_its_bound():
    s = Scheme(name="balanced ring")
    s.add_edge("A", "B", "a")
    s.add_edge("B", "A", "b")
    s.add_edge("B", "C", "c")
    s.add_edge("C", "B", "d")
    s.add_edge("C", "A", "e")
    s.add_edge("A", "C", "a*c*e/(b*d)")   # Kolmogorov: the ring is balanced
    s.add_observable("J", {"net_flux": "A->B"})
    s.add_observable("J_plus", {"flux": "A->B"})
    m = compile_scheme(s, method="elimination", jacobian=True, cache=False)
    rng = random.Random(4)
    X = np.array([[10 ** rng.uniform(-3, 3) for _ in s.symbols] for _ in range(30)])
    O = m.observables(X)
    assert np.all(np.abs(O[:, 0]) <= 8 * np.finfo(float).eps * 2 * O[:, 1])
    # J ≡ 0 here, so its gradient is 0; the compiled rows (jac(J+) − jac(J−),
    # never a relative adjoint divided by J = 0) are finite themselves
    a, b = m.info.groups["obs_jac"]
    assert np.isfinite(m._outputs(m.as_array(X))[:, a:b]).all()
    J = m.observable_jacobian(X)
    assert np.all(np.abs(J[:, 0, :]) <= 64 * np.finfo(float).eps * O[:, 1:2] * (1 + 1 / X))


def test_fallback_rows_evaluate_weights_per_row():
    """Rows the steady-state guard sends to the looped path (labels spread over
    450 decades under the tree method) get their rate weights evaluated at
    that row; checked against mpmath."""
    s = briggs_haldane()
    s.add_edge("ES", "EX", "k_x")
    s.add_edge("EX", "E", "k_y")
    s.add_parameter("k_x", value=1.0)
    s.add_parameter("k_y", value=1.0)
    s.add_observable("flux_x", {"flux": "ES->EX"})
    m = compile_scheme(s, method="trees", cache=False)
    vals = {"k_on": 1e150, "k_off": 1e-150, "k_cat": 2.0, "S": 1.0, "E0": 3.0, "k_x": 1e-149, "k_y": 1e-100}
    O = m.observables(vals)[0]
    rates = m.labels(vals)[0]
    with mpmath.workdps(800):  # 450 decades of rates: enough digits for the reference solve
        p = mp_steady_state(len(s.states), s.edge_list(), [mpmath.mpf(float(r)) for r in rates],
                            dps=800, floats=False)
        i = s.states.index("ES")
        v = p[i] * 2 * 3
        fx = p[i] * mpmath.mpf(1e-149)
    np.testing.assert_allclose(O, [float(v), float(fx)], rtol=1e-13)


@pytest.mark.parametrize("backend", BACKENDS)
def test_flux_observables_agree_across_back_ends(backend):
    s = ordered_bi_bi()
    s.add_observable("rate_expr", {"EA": "k3*B", "EQ": "k7 + 2*k8"})
    ref = compile_scheme(s, method="elimination", backend="python", cache=False)
    m = compile_scheme(s, method="elimination", backend=backend, cache=False)
    rng = np.random.default_rng(5)
    X = 10 ** rng.uniform(-2, 2, size=(64, len(s.symbols)))
    np.testing.assert_allclose(m.observables(X), ref.observables(X), rtol=1e-14, atol=0)


# ------------------------------------------------------------------ derivatives

def _mp_observables(scheme, vals, dps=60):
    """Observables from an mpmath steady state, weights from the labels (mpmath)."""
    with mpmath.workdps(dps):
        env = {k: mpmath.mpf(v) for k, v in vals.items()}
        g = ir.Graph()
        column = {n: j for j, n in enumerate(scheme.symbols)}
        xs = [env[n] for n in scheme.symbols]
        dom = ir.Domain(input=mpmath.mpf, const=lambda v: mpmath.mpf(v.numerator) / v.denominator,
                        add=mpmath.fsum, mul=mpmath.fprod, div=lambda a, b: a / b, sub=lambda a, b: a - b,
                        neg=lambda a: -a, pow=lambda a, b: a ** b, exp=mpmath.exp, log=mpmath.log,
                        sqrt=mpmath.sqrt, max=max)
        rates = ir.evaluate(g, [ir.lower_label(g, e.label, column) for e in scheme.edges], xs, dom)
        p = mp_steady_state(len(scheme.states), scheme.edge_list(), rates, dps=dps, floats=False)
        idx = scheme.index()
        out = []
        for terms in scheme.observable_terms().values():
            total = mpmath.mpf(0)
            for st, label in terms:
                total += p[idx[st]] * ir.evaluate(g, [ir.lower_label(g, label, column)], xs, dom)[0]
            out.append(total)
        return out


def _rate_scheme():
    s = briggs_haldane()
    s.add_edge("ES", "EP", "k_x*S")
    s.add_edge("EP", "ES", "k_y")
    s.add_edge("EP", "E", "k_rel")
    for k in ("k_x", "k_y", "k_rel"):
        s.add_parameter(k, value=1.0)
    s.add_observable("release", {"flux": "EP->E"})
    s.add_observable("net", {"net_flux": "ES->EP"})
    s.add_observable("mixed", {"E": 2.0, "EP": "k_rel/k_y"})
    return s


@pytest.mark.parametrize("log", [False, True])
def test_observable_jacobian_against_mpmath_differences(log):
    s = _rate_scheme()
    m = compile_scheme(s, method="elimination", jacobian=True, log_jacobian=log, cache=False)
    rng = random.Random(6)
    for _ in range(3):
        vals = _rand_values(rng, s.symbols, -1, 1)
        J = m.observable_jacobian(vals)[0]
        h = mpmath.mpf("1e-25")
        with mpmath.workdps(60):
            for j, name in enumerate(s.symbols):
                up, dn = dict(vals), dict(vals)
                x = mpmath.mpf(vals[name])
                step = h * x
                up[name], dn[name] = x + step, x - step
                d = [(a - b) / (2 * step) for a, b in zip(_mp_observables(s, up), _mp_observables(s, dn))]
                ref = [float(v * x) if log else float(v) for v in d]
                scale = [abs(float(o)) / (1 if log else vals[name]) for o in _mp_observables(s, vals)]
                for k in range(len(ref)):
                    assert abs(J[k, j] - ref[k]) <= 1e-12 * max(scale[k], abs(ref[k])) + 1e-300, \
                        (s.symbols[j], m.observable_names[k], J[k, j], ref[k])


def test_input_derivatives_of_rate_observables_against_mpmath():
    s = _rate_scheme()
    m = compile_scheme(s, method="elimination", input_derivatives="S", cache=False)
    rng = random.Random(7)
    vals = _rand_values(rng, s.symbols, -1, 1)
    d1, d2 = m.input_derivatives(vals, observables=True)
    with mpmath.workdps(80):
        x = mpmath.mpf(vals["S"])
        h = x * mpmath.mpf("1e-20")

        def at(v):
            return _mp_observables(s, {**vals, "S": v}, dps=80)

        up, mid, dn = at(x + h), at(x), at(x - h)
        r1 = [float((a - b) / (2 * h)) for a, b in zip(up, dn)]
        r2 = [float((a - 2 * c + b) / h ** 2) for a, c, b in zip(up, mid, dn)]
    np.testing.assert_allclose(d1[0], r1, rtol=1e-11, atol=1e-14)
    np.testing.assert_allclose(d2[0], r2, rtol=1e-10, atol=1e-13)


def test_ir_keeps_p_subtraction_free_and_one_subtraction_per_net_flux():
    s = _rate_scheme()
    fn, _ = build(s, method="elimination")
    nodes, _ = _observable_nodes(s, fn)
    fn.add_group("obs", nodes)
    assert ir.subtractive_nodes(fn, groups=("p",)) == []
    above = ir.subtractive_nodes(fn, groups=("obs",))
    assert [fn.graph.ops[i] for i in above] == ["sub"]          # the net flux, once
    assert above[0] == nodes[list(s.observables).index("net")]


# ------------------------------------------------------------------ formula, emit, files

def _write(tmp_path, name, text):
    path = tmp_path / name
    path.write_text(textwrap.dedent(text))
    return str(path)


def test_formula_cli_ping_pong_has_no_constant_term(tmp_path, capsys):
    path = tmp_path / "pp.toml"
    path.write_text(model_text(ping_pong()))       # the model file, written by treeflux's writer
    assert main(["formula", str(path), "--observable", "v", "--collect", "A,B",
                 "--set", "P=0", "--set", "Q=0"]) == 0
    text = capsys.readouterr().out
    lines = {ln.split(" = ", 1)[0]: ln.split(" = ", 1)[1] for ln in text.splitlines() if ln[:2] in ("N ", "D ")}
    names = {n: sympy.Symbol(n, positive=True) for n in ["A", "B", "E0"] + [f"k{i}" for i in range(1, 9)]}
    N, D = (sympy.sympify(lines[x], locals=names) for x in ("N", "D"))
    A, B = names["A"], names["B"]
    assert D.subs({A: 0, B: 0}) == 0                                   # no constant term
    assert {m for m, _ in sympy.Poly(D, A, B).terms()} == {(1, 0), (0, 1), (1, 1)}
    k = [names[f"k{i}"] for i in range(1, 9)]
    assert sympy.simplify(N / D - ping_pong_law(k, A, B, names["E0"])) == 0   # Segel 1975 (from memory)


def test_formula_ordered_bi_bi_has_the_constant_term():
    text = coefficient_form(ordered_bi_bi(), collect=["A", "B"], observable="v", sets={"P": 0, "Q": 0})
    D = text.split("\nD = ")[1].strip()
    names = {n: sympy.Symbol(n, positive=True) for n in ["A", "B"] + [f"k{i}" for i in range(1, 9)]}
    D = sympy.sympify(D, locals=names)
    N = sympy.sympify(text.split("\nN = ")[1].split("\n")[0], locals=names)
    A, B = names["A"], names["B"]
    assert D.subs({A: 0, B: 0}) != 0                                   # Kia·Kb
    k = [names[f"k{i}"] for i in range(1, 9)]
    assert sympy.simplify(N / D - ordered_law(k, A, B)) == 0


def test_shared_form_prints_rate_weights():
    text = shared_form(ping_pong(), observable="v")
    last = text.strip().splitlines()[-1]
    assert last.startswith("v = ") and "k3" in last and "E0" in last and "rho_EA" in last
    text = shared_form(ordered_bi_bi(), observable="v_net")
    last = text.strip().splitlines()[-1]
    assert " - " in last and "k6" in last and "k5" in last


def test_emitted_python_module_evaluates_rate_observables(tmp_path):
    s = _rate_scheme()
    m = compile_scheme(s, method="elimination", cache=False)
    m.emit("python", tmp_path)
    rng = np.random.default_rng(8)
    X = 10 ** rng.uniform(-1, 1, size=(5, len(s.symbols)))
    np.save(tmp_path / "X.npy", X)
    code = ("import numpy as np, briggs_haldane as mod; "
            "np.save('O.npy', mod.observables(np.load('X.npy'))); print(mod.OBSERVABLES)")
    env = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}
    res = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, capture_output=True, text=True, env=env)
    assert res.returncode == 0, res.stderr
    assert "release" in res.stdout and "net" in res.stdout
    np.testing.assert_allclose(np.load(tmp_path / "O.npy"), m.observables(X), rtol=1e-14, atol=1e-300)


def test_model_file_round_trip_and_numbers_weights_still_work(tmp_path):
    s = _rate_scheme()
    path = tmp_path / "out.toml"
    path.write_text(model_text(s))
    back = load(path)
    assert back.observables == s.observables
    assert back.observable_terms() == s.observable_terms()
    m = compile_scheme(s, method="elimination", cache=False)
    assert m.observable_names == ("v", "release", "net", "mixed")
    with pytest.raises(Exception, match="rate"):
        m.observable_weights  # weights depend on θ: refused as a constant matrix
    const = compile_scheme(load(os.path.join(os.path.dirname(__file__), "..", "examples",
                                             "enzyme_competitive_inhibitor.toml")), cache=False)
    assert const.observable_weights.shape == (3, 2)


@pytest.mark.parametrize("spec, message", [
    ({"flux": "ES->EX"}, "unknown state 'EX'"),
    ({"flux": "E->E0"}, "unknown state 'E0'"),
    ({"flux": "EP->ES"}, "no edge EP->ES"),
    ({"net_flux": "ES->EP"}, "reverse edge EP->ES"),
    ({"flux": "ES->E", "ES": 1.0}, "stands alone"),
    ({"flux": 3}, "must name an edge"),
    ({"ES": "k_cat*"}, "malformed"),
    ({"ES": "k_zzz"}, "undeclared symbol 'k_zzz'"),
    ({"EX": "k_cat"}, "unknown state 'EX'"),
])
def test_bad_observables_refused_in_one_line(spec, message):
    data = {"parameters": {"k_on": 1.0, "k_off": 1.0, "k_cat": 1.0}, "inputs": {"S": 1.0},
            "edges": [{"source": "E", "target": "ES", "rate": "k_on*S"},
                      {"source": "ES", "target": "E", "rate": "k_off + k_cat"},
                      {"source": "ES", "target": "EP", "rate": "k_cat"},
                      {"source": "EP", "target": "E", "rate": "k_off"}],
            "observables": {"bad": spec}}
    with pytest.raises(ModelError, match=message) as err:
        from_data(data, where="m.toml")
    assert "\n" not in str(err.value) and "m.toml" in str(err.value) and "'bad'" in str(err.value)


def test_net_flux_needs_the_reverse_edge(tmp_path, capsys):
    path = _write(tmp_path, "m.toml", """
        parameters = { k = 1.0 }
        edges = [{ source = "A", target = "B", rate = "k" }, { source = "B", target = "C", rate = "k" },
                 { source = "C", target = "A", rate = "k" }]
        observables = { J = { net_flux = "A->B" } }
        """)
    assert main(["eval", path]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "reverse edge B->A" in err and "m.toml" in err


# ------------------------------------------------------------------ analysis

def test_response_sample_and_fit_handle_rate_observables():
    from treeflux.runtime.analysis import fit, response_curve, sample

    s = briggs_haldane()
    m = compile_scheme(s, method="elimination", jacobian=True, cache=False)
    vals = {"k_on": 2.0, "k_off": 3.0, "k_cat": 5.0, "E0": 0.5}
    # Briggs & Haldane 1925: the half-saturating S of v is Km = (k_off + k_cat)/k_on
    r = response_curve(m, observable="v", input="S", lo=1e-3, hi=1e4, values=vals)
    assert abs(r["ec50"] / 4.0 - 1) < 1e-6
    out = sample(m, 20, seed=1, values={"S": 2.0, "E0": 0.5})
    cols = out["columns"]
    theta = {k: out["data"][:, cols.index(k)] for k in ("k_on", "k_off", "k_cat")}
    X = {**theta, "S": 2.0, "E0": 0.5}
    np.testing.assert_allclose(out["data"][:, cols.index("v")], m.observables(X)[:, 0], rtol=1e-14)
    np.testing.assert_allclose(out["data"][:, cols.index("v")],           # Briggs & Haldane 1925
                               theta["k_cat"] * 0.5 * 2 / ((theta["k_off"] + theta["k_cat"]) / theta["k_on"] + 2),
                               rtol=1e-13)
    # sampling with a response summary of the rate observable runs too
    resp = sample(m, 4, seed=2, values={"E0": 0.5},
                  response={"observable": "v", "input": "S", "lo": 1e-3, "hi": 1e4, "points": 21})
    rc = resp["columns"]
    th = {k: resp["data"][:, rc.index(k)] for k in ("k_on", "k_off", "k_cat")}
    ec50 = [c for c in rc if "ec50" in c][0]
    np.testing.assert_allclose(resp["data"][:, rc.index(ec50)], (th["k_off"] + th["k_cat"]) / th["k_on"], rtol=1e-5)
    S = np.array([0.5, 1, 2, 4, 8, 16, 32.0])
    v = m.observables({**vals, "S": S})[:, 0]
    res = fit(m, {"S": S, "v": v}, values={"E0": 0.5, "k_off": 3.0})
    assert res["jacobian"] == "compiled"
    assert abs(res["parameters"]["k_cat"] / 5.0 - 1) < 1e-6
    assert abs(res["parameters"]["k_on"] / 2.0 - 1) < 1e-6


def test_emitted_c_prints_rate_observables_at_model_values(tmp_path):
    import shutil

    cc = shutil.which("gcc") or shutil.which("cc")
    assert cc is not None, "the C back end needs a C compiler (gcc or cc) on PATH"
    path = os.path.join(os.path.dirname(__file__), "..", "examples", "enzyme_velocity.toml")
    m = compile_scheme(load(path), cache=False)
    m.emit("c", tmp_path)
    sources = [p.name for p in tmp_path.glob("*.c")]
    subprocess.run([cc, "-std=c99", "-Wall", "-Wextra", "-pedantic", "-Werror", "-O1", "-o", "ex", *sources, "-lm"],
                   cwd=tmp_path, check=True)
    res = subprocess.run([str(tmp_path / "ex")], capture_output=True, text=True, check=True)
    printed = {ln.split("\t")[1]: float(ln.split("\t")[0]) for ln in res.stdout.splitlines() if "\t" in ln}
    O = m.observables({})[0]
    for name, value in zip(m.observable_names, O):
        assert abs(printed[name] - value) <= 1e-15 * abs(value), (name, printed[name], value)


def test_observable_jacobian_safe_path_at_zero_concentration():
    """A plain derivative along an input at 0 goes to the multiprecision path
    (runtime.sensitivity) for the states; the rate weights' own gradients are
    added there per row. Checked against a one-sided mpmath difference."""
    s = _rate_scheme()
    m = compile_scheme(s, method="elimination", jacobian=True, cache=False)
    rng = random.Random(9)
    vals = _rand_values(rng, s.symbols, -1, 1)
    vals["S"] = 0.0
    J = m.observable_jacobian(vals)[0]
    j = s.symbols.index("S")
    with mpmath.workdps(60):
        h = mpmath.mpf("1e-30")
        up = _mp_observables(s, {**vals, "S": h})
        at0 = _mp_observables(s, vals)
        ref = [float((a - b) / h) for a, b in zip(up, at0)]
    for k, name in enumerate(m.observable_names):
        assert abs(J[k, j] - ref[k]) <= 1e-12 * max(1.0, abs(ref[k])), (name, J[k, j], ref[k])
    assert any(abs(r) > 1e-3 for r in ref)  # the check is not vacuous
