"""Rates must be positive; symbols may be signed.

A rate that evaluates negative, NaN or infinite is refused on every method
and back end with one line naming the model file, the row and the edge by its
state names. Symbols whose declared range allows it may be negative
(voltages); a symbol without a declared min keeps the rule parameters > 0,
inputs ≥ 0. A rate of exactly zero is an absent edge.
"""

import subprocess
import sys

import mpmath
import numpy as np
import pytest

from treeflux.compiler import parse
from treeflux.compiler.pipeline import compile_scheme
from treeflux.runtime.errors import EvaluationError

CHANNEL = '''
# An invented voltage-gated channel: closed C, open O, inactivated I.
name = "voltage channel"

[parameters]
a0 = { value = 2.0 }
b0 = { value = 0.5 }
z  = { value = 1.7 }
ki = { value = 0.3 }
kr = { value = 0.05 }

[inputs]
V = { value = -60.0, min = -120.0, max = 60.0 }

[[edges]]
source = "C"
target = "O"
rate = "a0*exp(z*V/25.7)"

[[edges]]
source = "O"
target = "C"
rate = "b0*exp(-z*V/25.7)"

[[edges]]
source = "O"
target = "I"
rate = "ki"

[[edges]]
source = "I"
target = "C"
rate = "kr"
'''

DIFFERENCE = '''
name = "difference"

[parameters]
k2 = { value = 1.0 }
k4 = { value = 3.0 }
k1 = { value = 1.0 }
g  = { value = 2.0, min = -5.0, max = 5.0 }
x  = { value = 1.0 }

[[edges]]
source = "Apo"
target = "Holo"
rate = "k2 - k4"

[[edges]]
source = "Holo"
target = "Apo"
rate = "k1"

[[edges]]
source = "Holo"
target = "Bound"
rate = "sqrt(g)"

[[edges]]
source = "Bound"
target = "Apo"
rate = "exp(exp(x))"
'''

METHODS = ("trees", "elimination", "numeric")


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("models")
    (d / "channel.toml").write_text(CHANNEL)
    (d / "difference.toml").write_text(DIFFERENCE)
    return d


def channel_truth(V):
    """Closed form of the three-state cycle C→O→I→C with O→C, at 50 digits
    (mpmath): by the Matrix-Tree theorem (Hill's diagram method),
    ρ_C = b·ki·... summed over the three spanning trees into each state."""
    with mpmath.workdps(50):
        a = mpmath.mpf(2) * mpmath.exp(mpmath.mpf("1.7") * V / mpmath.mpf("25.7"))
        b = mpmath.mpf("0.5") * mpmath.exp(-mpmath.mpf("1.7") * V / mpmath.mpf("25.7"))
        ki, kr = mpmath.mpf("0.3"), mpmath.mpf("0.05")
        # trees into C: {O->C, I->C}, {O->I, I->C}; into O: {C->O, I->C->O}; into I: {C->O->I}
        rho_c = b * kr + ki * kr
        rho_o = a * kr
        rho_i = a * ki
        total = rho_c + rho_o + rho_i
        return {"C": float(rho_c / total), "O": float(rho_o / total), "I": float(rho_i / total)}


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize("backend", ["python", "llvm"])
def test_voltage_channel_against_mpmath(files, method, backend):
    m = compile_scheme(parse.load(files / "channel.toml"), method=method, backend=backend, cache=False)
    V = np.linspace(-120.0, 60.0, 37)
    P = m.steady_state({"V": V})
    for r, v in enumerate(V):
        truth = channel_truth(mpmath.mpf(float(v)))
        for k, s in enumerate(m.states):
            assert P[r, k] == pytest.approx(truth[s], rel=1e-14), (method, backend, v, s)


def test_voltage_channel_native_backend(files):
    m = compile_scheme(parse.load(files / "channel.toml"), method="elimination", backend="c", cache=False)
    P = m.steady_state({"V": np.array([-120.0, 0.0, 60.0])})
    for r, v in enumerate((-120.0, 0.0, 60.0)):
        truth = channel_truth(mpmath.mpf(v))
        assert P[r] == pytest.approx([truth[s] for s in m.states], rel=1e-14)


def refusal(m, values):
    with pytest.raises(EvaluationError) as info:
        m.steady_state(values)
    text = str(info.value)
    assert "\n" not in text and "np." not in text
    return text


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize("backend", ["python", "llvm"])
def test_bad_rates_refused_with_edge_names(files, method, backend):
    m = compile_scheme(parse.load(files / "difference.toml"), method=method, backend=backend, cache=False)
    # k2 - k4 < 0
    text = refusal(m, {"k2": 1.0, "k4": 3.0})
    assert "difference.toml" in text and "Apo->Holo" in text and "-2.0" in text and "row 0" in text
    # sqrt of a negative symbol: NaN
    text = refusal(m, {"k2": 4.0, "k4": 1.0, "g": np.array([1.0, -1.0])})
    assert "Holo->Bound" in text and "row 1" in text and "not a number" in text
    # exp(exp(x)) overflows
    text = refusal(m, {"k2": 4.0, "k4": 1.0, "x": 800.0})
    assert "Bound->Apo" in text and "inf" in text
    # the same refusals from observables()-free paths: basis()
    with pytest.raises(EvaluationError, match="Apo->Holo"):
        m.basis({"k2": 1.0, "k4": 3.0})


@pytest.mark.parametrize("backend", ["c", "cython"])
def test_bad_rates_refused_native(files, backend):
    m = compile_scheme(parse.load(files / "difference.toml"), method="elimination", backend=backend, cache=False)
    assert "Apo->Holo" in refusal(m, {"k2": 1.0, "k4": 3.0})
    assert "Bound->Apo" in refusal(m, {"k2": 4.0, "k4": 1.0, "x": 800.0})


@pytest.mark.parametrize("method", METHODS)
def test_zero_rate_is_an_absent_edge(files, method):
    m = compile_scheme(parse.load(files / "difference.toml"), method=method, backend="llvm", cache=False)
    # k2 = k4: Apo->Holo vanishes, Apo is absorbing (the only terminal state)
    P = m.steady_state({"k2": np.array([2.0, 3.0]), "k4": np.array([2.0, 1.0])})
    assert P[0].tolist() == [1.0 if s == "Apo" else 0.0 for s in m.states]
    # k2 - k4 = 2, k1 = 1, sqrt(2), e^e: exact balance of the cycle (mpmath)
    with mpmath.workdps(50):
        a, b, c, d = mpmath.mpf(2), mpmath.mpf(1), mpmath.sqrt(2), mpmath.exp(mpmath.e)
        # trees of the 3-cycle Apo->Holo->Bound->Apo with Holo->Apo
        rho = {"Apo": b * d + c * d, "Holo": a * d, "Bound": a * c}
        total = sum(rho.values())
        truth = [float(rho[s] / total) for s in m.states]
    assert P[1] == pytest.approx(truth, rel=1e-14)


def test_symbol_without_declared_min_keeps_the_sign_rule(files):
    m = compile_scheme(parse.load(files / "channel.toml"), method="elimination", backend="python", cache=False)
    with pytest.raises(EvaluationError, match=r"channel.toml: row 0: parameter 'ki' must be positive"):
        m.steady_state({"ki": -0.3})
    # V has min = -120: negative values are fine
    assert m.steady_state({"V": -100.0}).sum() == pytest.approx(1.0)


def test_cli_refusal_one_line_exit_2(files):
    cmd = [sys.executable, "-m", "treeflux.compiler.cli", "eval", str(files / "difference.toml")]
    for extra in ([], ["--method", "trees"], ["--method", "numeric"]):
        r = subprocess.run(cmd + extra, capture_output=True, text=True)
        assert r.returncode == 2
        lines = r.stderr.strip().splitlines()
        assert len(lines) == 1 and "Apo->Holo" in lines[0] and "difference.toml" in lines[0]
    r = subprocess.run(cmd + ["--set", "k2=4", "--set", "x=800"], capture_output=True, text=True)
    assert r.returncode == 2 and "Bound->Apo" in r.stderr and len(r.stderr.strip().splitlines()) == 1
