"""Reduced detailed-balance conditions, the equilibrium restriction, drawings.

Outside references: Kolmogorov's criterion (a reversible chain is in
detailed balance iff every cycle's forward and reverse rate products agree),
checked exactly with fractions at random rational points; the PNG signature
(PNG specification, ISO/IEC 15948) and the SVG XML prolog.
"""

import random
import subprocess
import sys
from fractions import Fraction
from pathlib import Path

import pytest
import sympy

from treeflux.compiler import compile_scheme, load
from treeflux.compiler.balance import condition_texts, equilibrium_restriction, reduce_conditions
from treeflux.compiler.cli import main
from treeflux.compiler.ir import Graph, evaluate, lower_label
from treeflux.compiler.structure import detailed_balance
from treeflux.runtime import graph

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"


def _rates_at(scheme, values):
    g = Graph()
    column = {name: j for j, name in enumerate(scheme.symbols)}
    nodes = [lower_label(g, e.label, column) for e in scheme.edges]
    rates = evaluate(g, nodes, [values[s] for s in scheme.symbols], "exact")
    return {(e.source, e.target): r for e, r in zip(scheme.edges, rates)}


def _cycle_ratios(scheme, values):
    """Π forward / Π reverse of every fundamental cycle, exactly."""
    rate = _rates_at(scheme, values)
    states = scheme.states
    idx = scheme.edge_list()
    out = []
    for cycle, _ in graph.fundamental_cycles(len(states), idx):
        ring = list(zip(cycle, cycle[1:] + cycle[:1]))
        f = r = Fraction(1)
        for a, b in ring:
            f *= rate[(states[a], states[b])]
            r *= rate[(states[b], states[a])]
        out.append(f / r)
    return out


@pytest.mark.parametrize("example", ["promoter_two_activators.toml", "promoter_three_activators.toml",
                                     "promoter_three_activators_composed.toml"])
def test_promoter_conditions_reduce_to_w_equals_one(example):
    s = load(EXAMPLES / example)
    db = detailed_balance(s)
    assert db["verdict"] == "conditional"
    assert db["conditions"] == ["w = 1"]
    # Equivalence, exactly at random rational points: with w = 1 every cycle
    # balances; with w != 1 some cycle does not (and "w = 1" fails too).
    rng = random.Random(4)
    for w in (Fraction(1), Fraction(rng.randint(2, 999), rng.randint(1, 999))):
        values = {name: Fraction(rng.randint(1, 10**6), rng.randint(1, 10**6)) for name in s.symbols}
        values["w"] = w
        balanced = all(r == 1 for r in _cycle_ratios(s, values))
        assert balanced == (w == 1)


def test_reduction_drops_duplicates_reciprocals_and_implied_conditions():
    w, a, b, k = sympy.symbols("w a b k", positive=True)
    assert condition_texts(reduce_conditions([w, 1 / w, w ** 2 / w, sympy.Integer(1)])) == ["w = 1"]
    assert condition_texts(reduce_conditions([2 * a / b, 4 * a ** 2 / b ** 2])) == ["2*a = b"]
    # a*k/b and (a/b)*(k) imply a/b*k**2/k ...: rank 2 of 3
    got = reduce_conditions([a * k / b, k, a / b])
    assert len(got) == 2
    # non-monomial ratios: shown as numerator = denominator, duplicates dropped
    texts = condition_texts(reduce_conditions([(a + b) / (k + b), (k + b) / (a + b)]))
    assert len(texts) == 1 and set(texts[0].replace(" ", "").split("=")) == {"a+b", "b+k"}


def test_equilibrium_restriction_balances_exactly_and_keeps_the_graph(tmp_path):
    s = load(EXAMPLES / "promoter_three_activators.toml")
    r = equilibrium_restriction(s)
    assert r.states == s.states
    assert [(e.source, e.target) for e in r.edges] == [(e.source, e.target) for e in s.edges]
    assert detailed_balance(r)["verdict"] is True
    # one rate fixed per chord whose cycle did not already balance; the rest unchanged
    changed = [e for e, o in zip(r.edges, s.edges) if e.rate != o.rate]
    assert len(changed) == len(r.restricted_edges) > 0
    rng = random.Random(9)
    for _ in range(3):
        values = {name: Fraction(rng.randint(1, 10**6), rng.randint(1, 10**6)) for name in r.symbols}
        assert all(x == 1 for x in _cycle_ratios(r, values))
    # where the original already balances (w = 1) the restriction changes nothing
    values = {name: Fraction(rng.randint(1, 10**6), rng.randint(1, 10**6)) for name in r.symbols}
    values["w"] = Fraction(1)
    assert _rates_at(r, values) == _rates_at(s, values)
    # written as a model file, it loads with the same states and edges
    out = tmp_path / "eq.toml"
    assert main(["equilibrium", str(EXAMPLES / "promoter_three_activators.toml"), "-o", str(out)]) == 0
    again = load(out)
    assert again.states == r.states
    assert {(e.source, e.target): e.rate for e in again.edges} == {(e.source, e.target): e.rate for e in r.edges}
    m = compile_scheme(again, backend="python")
    assert m.profile["plan"]["detailed_balance"] is True


def test_restriction_of_a_scheme_with_one_way_edges_is_refused(tmp_path):
    res = subprocess.run([sys.executable, "-m", "treeflux.compiler.cli", "equilibrium",
                          str(EXAMPLES / "proofreading_two_step.toml"), "-o", str(tmp_path / "x.toml")],
                         capture_output=True, text=True)
    assert res.returncode == 2
    assert len(res.stderr.strip().splitlines()) == 1 and "has no reverse edge" in res.stderr
    assert not (tmp_path / "x.toml").exists()


@pytest.mark.parametrize("name, head", [("s.png", b"\x89PNG\r\n\x1a\n"), ("s.svg", b"<?xml")])
def test_draw_writes_png_and_svg(tmp_path, name, head):
    out = tmp_path / name
    for model, hl in (("promoter_three_activators_composed.toml", "tree"), ("proofreading_two_step.toml", "cycles")):
        assert main(["draw", str(EXAMPLES / model), "-o", str(out), "--highlight", hl]) == 0
        data = out.read_bytes()
        assert data.startswith(head) and len(data) > 10_000
    assert [p.name for p in tmp_path.iterdir()] == [name]  # no temporaries left


def test_draw_refuses_other_formats_before_loading(tmp_path):
    res = subprocess.run([sys.executable, "-m", "treeflux.compiler.cli", "draw", "/nonexistent/model.toml",
                          "-o", str(tmp_path / "x.gif")], capture_output=True, text=True)
    assert res.returncode == 2 and "use a .png or .svg" in res.stderr
    assert len(res.stderr.strip().splitlines()) == 1
