"""Closed forms: the shared form, the equilibrium (path-product) form, the
coefficient (polynomial) form, substitution of values, LaTeX.

Every printed formula is read back and evaluated exactly (Fractions) at
random rational points and compared with the solver's exact tree sums.
Outside references: the Briggs–Haldane velocity v = k2 E0 S/(Km + S),
Km = (k-1 + k2)/k1 (Briggs & Haldane, Biochem. J. 19 (1925) 338); the
ping-pong bi-bi initial-rate law v = V A B/(Kb A + Ka B + A B), whose
denominator has no constant term (Cleland, Biochim. Biophys. Acta 67
(1963) 104; Segel, Enzyme Kinetics (1975), ch. 9 — from memory).
"""

import random
import re
from fractions import Fraction
from pathlib import Path

import pytest
import sympy

from treeflux.compiler import ModelError, Scheme, TooLargeError, compile_scheme, load
from treeflux.compiler.cli import main
from treeflux.compiler.formula import coefficient_form, shared_form
from treeflux.compiler.ir import Graph, evaluate, lower_label
from treeflux.compiler.parse import label_symbols, parse_label

from .schemes import exact_steady_state

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"


def _exact_p(scheme, values):
    return exact_steady_state(scheme, values)


def _run_program(text, values):
    """Evaluate 'name = expr' lines exactly, in order (our whitelist parser)."""
    env = dict(values)
    for line in text.splitlines():
        if not line or line.startswith("#"):
            continue
        name, expr = (x.strip() for x in line.split("=", 1))
        label = parse_label(expr)
        g = Graph()
        syms = label_symbols(label)
        node = lower_label(g, label, {s: k for k, s in enumerate(syms)})
        env[name] = evaluate(g, [node], [env[s] for s in syms], "exact")[0]
    return env


def _sym(text, names):
    """Read our printed polynomial back with SymPy (test side only)."""
    return sympy.sympify(text, locals={n: sympy.Symbol(n, positive=True) for n in names})


def _point(scheme, seed):
    rng = random.Random(seed)
    return {s: Fraction(rng.randint(1, 999), rng.randint(1, 999)) for s in scheme.symbols}


@pytest.mark.parametrize("example", ["promoter_three_activators.toml", "enzyme_competitive_inhibitor.toml",
                                     "proofreading_two_step.toml"])
def test_shared_form_is_short_and_exact(example):
    s = load(EXAMPLES / example)
    text = shared_form(s, method="elimination")
    lines = [x for x in text.splitlines() if x and not x.startswith("#")]
    assert len(lines) <= 400
    for seed in range(2):
        values = _point(s, seed)
        env = _run_program(text, values)
        truth = _exact_p(s, values)
        for state in s.states:
            assert env[f"p_{state}"] == truth[state]


def test_q4_shared_form_is_fast_and_bounded(capsys):
    assert main(["formula", str(EXAMPLES / "promoter_three_activators.toml")]) == 0
    out = capsys.readouterr().out
    assert 16 < len(out.splitlines()) < 400 and len(out) < 20_000


def test_equilibrium_method_prints_path_products():
    s = load(EXAMPLES / "enzyme_competitive_inhibitor.toml")
    text = shared_form(s, state="ES", method="equilibrium")
    assert "rho_ES = k_on*S/(k_off + k_cat)" in text
    assert "rho_EI = ki_on*I/ki_off" in text
    values = _point(s, 3)
    assert _run_program(text, values)["p_ES"] == _exact_p(s, values)["ES"]


def test_observable_formula_and_values_substituted_first():
    s = load(EXAMPLES / "promoter_two_activators.toml")
    text = shared_form(s, observable="polymerase_bound", sets={"w": 1})
    values = _point(s, 5)
    env = _run_program(text, {k: v for k, v in values.items() if k != "w"})
    values["w"] = Fraction(1)
    truth = _exact_p(s, values)
    weights = s.observables["polymerase_bound"]
    assert env["polymerase_bound"] == sum(Fraction(w) * truth[st] for st, w in weights.items())
    body = "\n".join(x for x in text.splitlines() if not x.startswith("#"))
    assert not re.search(r"\bw\b", body)


def _briggs_haldane():
    s = Scheme(name="single-substrate enzyme")
    s.add_parameter("k1")
    s.add_parameter("km1")
    s.add_parameter("k2")
    s.add_input("S")
    s.add_edge("E", "ES", "k1*S")
    s.add_edge("ES", "E", "km1 + k2")
    return s


def test_coefficient_form_gives_briggs_haldane():
    text = coefficient_form(_briggs_haldane(), collect=["S"], state="ES")
    N = re.search(r"^N = (.*)$", text, re.M).group(1)
    D = re.search(r"^D = (.*)$", text, re.M).group(1)
    k1, km1, k2, S = sympy.symbols("k1 km1 k2 S", positive=True)
    names = ["k1", "km1", "k2", "S"]
    # p_ES = S/(Km + S) with Km = (km1 + k2)/k1 (Briggs-Haldane)
    assert sympy.simplify(_sym(N, names) / _sym(D, names) - S / ((km1 + k2) / k1 + S)) == 0
    assert _sym(D, names).subs(S, 0) == k2 + km1


def _ping_pong():
    s = Scheme(name="ping-pong bi-bi")
    for k in ("k1", "k2", "k3", "k4", "k5", "k6", "k7", "k8"):
        s.add_parameter(k)
    for c in ("A", "B", "P", "Q"):
        s.add_input(c)
    s.add_edge("E", "EA", "k1*A")
    s.add_edge("EA", "E", "k2")
    s.add_edge("EA", "F", "k3")        # P released
    s.add_edge("F", "EA", "k4*P")
    s.add_edge("F", "FB", "k5*B")
    s.add_edge("FB", "F", "k6")
    s.add_edge("FB", "E", "k7")        # Q released
    s.add_edge("E", "FB", "k8*Q")
    return s


def test_ping_pong_denominator_has_no_constant_term(tmp_path):
    s = _ping_pong()
    text = coefficient_form(s, collect=["A", "B"], state="FB", sets={"P": 0, "Q": 0})
    N = _sym(re.search(r"^N = (.*)$", text, re.M).group(1), s.symbols)
    D = _sym(re.search(r"^D = (.*)$", text, re.M).group(1), s.symbols)
    A, B = sympy.symbols("A B", positive=True)
    poly = sympy.Poly(D, A, B)
    monomials = {m for m, _ in poly.terms()}
    assert monomials == {(1, 0), (0, 1), (1, 1)}  # Kb·A + Ka·B + A·B: no constant term
    assert sympy.Poly(N, A, B).monoms() == [(1, 1)]
    # exact agreement with the solver at random rationals (P = Q = 0)
    rng = random.Random(2)
    values = {k: Fraction(rng.randint(1, 99), rng.randint(1, 99)) for k in s.symbols}
    values["P"] = values["Q"] = Fraction(0)
    from treeflux.compiler.formula import substituted
    truth = _exact_p(substituted(s, {"P": 0, "Q": 0}), {k: v for k, v in values.items() if k not in "PQ"})
    subs = {sympy.Symbol(k, positive=True): sympy.Rational(v.numerator, v.denominator) for k, v in values.items()}
    got = (N / D).subs(subs)
    assert Fraction(int(sympy.fraction(got)[0]), int(sympy.fraction(got)[1])) == truth["FB"]


def test_coefficient_form_refused_when_too_large():
    s = load(EXAMPLES / "promoter_three_activators.toml")
    with pytest.raises(TooLargeError, match="tree terms"):
        coefficient_form(s, collect=["c"], state="ABCP")


def test_latex_is_valid_on_both_sides(capsys):
    import matplotlib
    matplotlib.use("Agg")
    from matplotlib.mathtext import MathTextParser

    parser = MathTextParser("agg")
    assert main(["formula", str(EXAMPLES / "enzyme_competitive_inhibitor.toml"), "--latex"]) == 0
    out = capsys.readouterr().out
    assert out.startswith("\\begin{aligned}") and out.rstrip().endswith("\\end{aligned}")
    body = out.strip().splitlines()[1:-1]
    assert len(body) >= 4
    for line in body:
        eq = line.rstrip(" \\").replace("&=", "=")
        lhs, rhs = eq.split("=", 1)
        assert lhs.strip() and rhs.strip()
        parser.parse(f"${eq}$", dpi=72)  # raises on invalid TeX
    assert main(["formula", str(EXAMPLES / "enzyme_competitive_inhibitor.toml"), "--latex",
                 "--collect", "S,I", "--state", "ES"]) == 0
    parser.parse("$" + capsys.readouterr().out.strip() + "$", dpi=72)


def test_bad_formula_requests_are_one_line(capsys):
    path = str(EXAMPLES / "enzyme_competitive_inhibitor.toml")
    assert main(["formula", path, "--state", "nope"]) == 2
    assert main(["formula", path, "--set", "zz=1"]) == 2
    assert main(["formula", path, "--collect", "Q", "--state", "ES"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 3 and all(line.startswith("treeflux: ") for line in err)
