"""Composed schemes: products of parts with coupling factors, reversible pairs.

Outside references: the hand-written 16-state promoter example; the binomial
occupancy of independent sites (common practice); the equilibrium
distribution of pairwise-cooperative sites, weight ∝ x^j ω^(j(j−1)/2) per
configuration (statistical mechanics of binding, common practice); the MWC
saturation function (Monod, Wyman & Changeux, J. Mol. Biol. 12 (1965) 88);
the McKeithan proofreading fraction (k_p/(k_p + k_off))^N (McKeithan, PNAS
92 (1995) 5042; from memory).
"""

import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from treeflux.compiler import ModelError, compile_scheme, from_data, load
from treeflux.compiler.cli import main

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"


def _model(tmp_path, text, name="m.toml"):
    path = tmp_path / name
    path.write_text(text)
    return load(path)


def test_composed_promoter_equals_hand_written_state_for_state():
    hand = load(EXAMPLES / "promoter_three_activators.toml")
    comp = load(EXAMPLES / "promoter_three_activators_composed.toml")
    assert sorted(hand.states) == sorted(comp.states)
    assert {(e.source, e.target) for e in hand.edges} == {(e.source, e.target) for e in comp.edges}
    mh = compile_scheme(hand, backend="python")
    mc = compile_scheme(comp, backend="python")
    rng = np.random.default_rng(1)
    X = {name: 10 ** rng.uniform(-2, 2, size=20) for name in mh.symbols}
    Ph, Pc = mh.steady_state(X), mc.steady_state(X)
    for k, state in enumerate(mh.states):
        j = mc.states.index(state)
        assert np.max(np.abs(Pc[:, j] - Ph[:, k]) / Ph[:, k]) <= 1e-14
    # the composed file's part-count observable is the hand-written one
    ob = mc.observables(X)[:, mc.observable_names.index("polymerase_bound")]
    assert np.allclose(ob, mh.observables(X)[:, mh.observable_names.index("polymerase_bound")], rtol=1e-14)


SITES = """
name = "{n} identical sites, pairwise cooperativity"
[parameters]
k_on = {{ value = 2.0 }}
k_off = {{ value = 3.0 }}
w = {{ value = 5.0 }}
[inputs]
x = {{ value = 1.0 }}
[composition]
separator = "."
[parts.S]
copies = {n}
states = ["", "s{{k}}"]
steps = [["", "s{{k}}", "k_on*x", "k_off"]]
[[couplings]]
part = "S"
step = ["", "s{{k}}"]
factor = "w"
when = ["S"]
[observables]
bound = {{ parts = "S" }}
"""

LUMPED = """
name = "the same sites lumped by count"
[parameters]
k_on = {{ value = 2.0 }}
k_off = {{ value = 3.0 }}
w = {{ value = 5.0 }}
[inputs]
x = {{ value = 1.0 }}
[parts.L]
states = ["L{{0..{n}}}"]
steps = [["L{{0..{m}}}", "L{{1..{n}}}", "({{{n}..1}})*k_on*x*w**{{0..{m}}}", "({{1..{n}}})*k_off"]]
[observables]
bound = {{ "L1" = 1, "L2" = 2, "L3" = 3, "L4" = 4 }}
"""


@pytest.mark.parametrize("n", [3, 4])
def test_cooperative_sites_agree_with_lumped_count_and_closed_form(tmp_path, n):
    full = _model(tmp_path, SITES.format(n=n), "full.toml")
    lumped_text = LUMPED.format(n=n, m=n - 1)
    if n == 3:
        lumped_text = lumped_text.replace(', "L4" = 4', "")
    lumped = _model(tmp_path, lumped_text, "lumped.toml")
    assert len(full.states) == 2 ** n and len(lumped.states) == n + 1
    assert full.states[0] == "ground" and "s1.s2" in full.states
    mf = compile_scheme(full, backend="python")
    ml = compile_scheme(lumped, backend="python")
    x = np.logspace(-3, 2, 40)
    yf = mf.observables({"x": x})[:, 0]
    yl = ml.observables({"x": x})[:, 0]
    assert np.max(np.abs(yf - yl) / yl) <= 1e-13
    # closed form: configuration weight (k_on x/k_off)^j w^(j(j-1)/2), C(n, j) configurations
    q = 2.0 * x / 3.0
    Z = sum(math.comb(n, j) * q ** j * 5.0 ** (j * (j - 1) / 2) for j in range(n + 1))
    mean = sum(j * math.comb(n, j) * q ** j * 5.0 ** (j * (j - 1) / 2) for j in range(n + 1)) / Z
    assert np.max(np.abs(yf - mean) / mean) <= 1e-13


def test_independent_sites_follow_the_binomial_law(tmp_path):
    text = SITES.format(n=4).replace('w = { value = 5.0 }', 'w = { value = 1.0 }')
    m = compile_scheme(_model(tmp_path, text), backend="python")
    P = m.steady_state({"x": 0.7})[0]
    theta = 2 * 0.7 / (2 * 0.7 + 3)
    for state, p in zip(m.states, P):
        j = 0 if state == "ground" else len(state.split("."))
        assert p == pytest.approx(theta ** j * (1 - theta) ** (4 - j), rel=1e-14)


MWC = """
name = "two-conformation receptor, {n} sites"
[parameters]
kRT = {{ value = 50.0 }}
kTR = {{ value = 0.5 }}
k_on = {{ value = 1.0 }}
koffR = {{ value = 0.2 }}
koffT = {{ value = 20.0 }}
[inputs]
x = {{ value = 1.0 }}
[parts.conf]
states = ["R", "T"]
steps = [["R", "T", "kRT", "kTR"]]
[parts.S]
copies = {n}
states = ["", "{{k}}"]
steps = [["", "{{k}}", "k_on*x", "koffR"]]
[[couplings]]
part = "S"
step = ["{{k}}", ""]
factor = "koffT/koffR"
when = ["conf=T"]
[[couplings]]
part = "conf"
step = ["R", "T"]
factor = "koffR/koffT"
when = ["S"]
[observables]
saturation = {{ parts = "S" }}
"""


def test_mwc_receptor_matches_the_closed_form(tmp_path):
    n = 3
    s = _model(tmp_path, MWC.format(n=n))
    assert len(s.states) == 2 * 2 ** n
    m = compile_scheme(s, backend="python")
    x = np.logspace(-3, 3, 30)
    y = m.observables({"x": x})[:, 0] / n
    # MWC 1965: Y = (a(1+a)^(n-1) + L c a (1+c a)^(n-1)) / ((1+a)^n + L (1+c a)^n),
    # a = x/K_R, c = K_R/K_T, L = [T0]/[R0] = kRT/kTR.
    a, c, L = x * 1.0 / 0.2, 0.2 / 20.0, 50.0 / 0.5
    Y = (a * (1 + a) ** (n - 1) + L * c * a * (1 + c * a) ** (n - 1)) / ((1 + a) ** n + L * (1 + c * a) ** n)
    assert np.max(np.abs(y - Y) / Y) <= 1e-13
    assert m.profile["plan"]["detailed_balance"] is True


PROOFREADING = """
name = "kinetic proofreading, {N} steps, right and wrong ligand"
[parameters]
kon = {{ value = 1.0 }}
kp = {{ value = 3.0 }}
koff_R = {{ value = 0.5 }}
koff_W = {{ value = 5.0 }}
[inputs]
LR = {{ value = 1.0 }}
LW = {{ value = 1.0 }}
[composition]
ground = "free"
[parts.receptor]
states = ["", "R{{0..{N}}}", "W{{0..{N}}}"]
steps = [
  ["", "R0", "kon*LR", "koff_R"], ["", "W0", "kon*LW", "koff_W"],
  ["R{{0..{M}}}", "R{{1..{N}}}", "kp"], ["W{{0..{M}}}", "W{{1..{N}}}", "kp"],
  ["R{{1..{N}}}", "", "koff_R"], ["W{{1..{N}}}", "", "koff_W"],
]
"""


def test_proofreading_chain_matches_mckeithan(tmp_path):
    N = 4
    s = _model(tmp_path, PROOFREADING.format(N=N, M=N - 1))
    assert len(s.states) == 2 * (N + 1) + 1
    m = compile_scheme(s, backend="python")
    P = dict(zip(m.states, m.steady_state({})[0]))
    for lig, koff in (("R", 0.5), ("W", 5.0)):
        bound = sum(P[f"{lig}{i}"] for i in range(N + 1))
        assert P[f"{lig}{N}"] / bound == pytest.approx((3.0 / (3.0 + koff)) ** N, rel=1e-13)


def test_reversible_pairs_in_one_block(tmp_path):
    paired = _model(tmp_path, """
[parameters]
k1 = { value = 2.0 }
Kd = { value = 4.0 }
k2 = { value = 3.0 }
k3 = { value = 7.0 }
[inputs]
S = { value = 8.0 }
[[pairs]]
from = "E"
to = "ES"
K = "S/Kd"
backward = "k1"
[[edges]]
source = "ES"
target = "EP"
rate = "k2"
[[edges]]
source = "EP"
target = "E"
rate = "k3"
""", "paired.toml")
    rates = {(e.source, e.target): e.rate for e in paired.edges}
    assert set(rates) == {("E", "ES"), ("ES", "E"), ("ES", "EP"), ("EP", "E")}
    m = compile_scheme(paired, backend="python")
    P = dict(zip(m.states, m.steady_state({})[0]))
    # By hand: E->ES at k1*S/Kd = 4, ES leaves at k1 + k2 = 5, EP leaves at 7:
    # p_ES/p_E = 4/5, p_EP/p_ES = 3/7.
    assert P["ES"] / P["E"] == pytest.approx(4 / 5, rel=1e-15)
    assert P["EP"] / P["ES"] == pytest.approx(3 / 7, rel=1e-15)


def test_pairs_with_forward_and_equilibrium_constant(tmp_path):
    s = _model(tmp_path, """
[parameters]
kf = { value = 2.0 }
K = { value = 4.0 }
[[pairs]]
from = "A"
to = "B"
K = "K"
forward = "kf"
""")
    m = compile_scheme(s, backend="python")
    P = m.steady_state({})[0]
    assert P[m.states.index("B")] / P[m.states.index("A")] == pytest.approx(4.0, rel=1e-15)


@pytest.mark.parametrize("text, message", [
    ('[parts.S]\ncopies = 13\nstates = ["", "s{k}"]\nsteps = [["", "s{k}", "k", "k"]]\n', "8,192 states"),
    ('[parts.A]\nstates = ["", "A"]\nsteps = [["", "B", "k"]]\n', "'B' is not a state of this part"),
    ('[parts.A]\nstates = ["", "A"]\nsteps = [{ from = "", to = "A", forward = "k" }]\n', "two of forward, backward and K"),
    ('[parts.A]\nstates = ["", "A"]\nsteps = [["", "A", "k", "k"]]\n[[couplings]]\npart = "A"\nstep = ["", "A"]\nfactor = "w"\nwhen = ["A"]\n',
     "its own part"),
    ('[parts.A]\nstates = ["", "x"]\nsteps = [["", "x", "k", "k"]]\n[parts.B]\nstates = ["", "x"]\nsteps = [["", "x", "k", "k"]]\n',
     "both named 'x'"),
    ('[parts.A]\nstates = ["", "A{0..2}"]\nsteps = [["A{0..1}", "A{2..3}", "k"]]\n', "not a state"),
    ('[parts.A]\nstates = ["", "A{0..2}"]\nsteps = [["A{0..1}", "A{1..3}", "k"]]\n', "different lengths"),
    ('[[couplings]]\npart = "A"\n', r"need \[parts\]"),
])
def test_bad_compositions_are_refused_in_one_line(tmp_path, text, message):
    path = tmp_path / "bad.toml"
    path.write_text(text)
    with pytest.raises(ModelError, match=message) as info:
        load(path)
    assert "\n" not in str(info.value) and str(path) in str(info.value)
    res = subprocess.run([sys.executable, "-m", "treeflux.compiler.cli", "profile", str(path)],
                         capture_output=True, text=True)
    assert res.returncode == 2 and len(res.stderr.strip().splitlines()) == 1


def test_same_description_same_names_order_and_bytes(tmp_path):
    a = load(EXAMPLES / "promoter_three_activators_composed.toml")
    b = load(EXAMPLES / "promoter_three_activators_composed.toml")
    assert a.canonical() == b.canonical()
    out1, out2 = tmp_path / "1", tmp_path / "2"
    compile_scheme(a, backend="python").emit("c", out1)
    compile_scheme(b, backend="python").emit("c", out2)
    for f in sorted(out1.iterdir()):
        assert (out2 / f.name).read_bytes() == f.read_bytes()


def test_python_api_takes_the_same_tables():
    s = from_data({
        "parameters": {"k_on": {"value": 1.0}, "k_off": {"value": 2.0}},
        "parts": {"S": {"copies": 2, "states": ["", "s{k}"], "steps": [["", "s{k}", "k_on", "k_off"]]}},
        "composition": {"separator": "+"},
    }, where="in-memory")
    assert s.states == ("ground", "s2", "s1", "s1+s2")
    m = compile_scheme(s, backend="python")
    P = m.steady_state({})[0]
    assert P[s.states.index("s1+s2")] == pytest.approx(1 / 9, rel=1e-15)


def test_profile_shows_the_generated_size(tmp_path, capsys):
    assert main(["profile", str(EXAMPLES / "promoter_three_activators_composed.toml"), "--json"]) == 0
    import json
    doc = json.loads(capsys.readouterr().out)
    assert len(doc["states"]) == 16 and doc["states"][0] == "empty"
