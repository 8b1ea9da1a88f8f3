"""Response curves that say what they mean: normalized to the observable's
limits at the ends of the input's domain, bell-shaped curves reported as
such, honest saturation flags and warnings, linear spacing over signed inputs.
Every scheme here is an invented scenario; each check names its source."""

import json
import math

import mpmath
import numpy as np
import pytest

from treeflux.compiler import Scheme, compile_scheme
from treeflux.compiler.cli import main
from treeflux.runtime.analysis import response_curve, response_summaries
from treeflux.runtime.errors import EvaluationError

from .schemes import mp_steady_state


# ------------------------------------------------------------------ schemes

def all_or_none(n, k=0.2, d=5.0):
    """E <-> E_Ln in one concerted step with rate k c^n: p(E_Ln) = c^n/(K^n + c^n),
    K^n = d/k, exactly the Hill function (Hill, J. Physiol. 40 (1910) iv)."""
    s = Scheme()
    s.add_parameter("k", value=k)
    s.add_parameter("d", value=d)
    s.add_input("c", value=1.0)
    s.add_edge("E", "ELn", f"k*c**{n}")
    s.add_edge("ELn", "E", "d")
    s.add_observable("bound", {"ELn": 1.0})
    s.add_observable("free", {"E": 1.0})
    return s, (d / k) ** (1.0 / n)


def michaelis_menten(k1=2.0, km1=3.0, kcat=1.0):
    """E + S <-> ES -> E + P as a cycle on the enzyme: v/Vmax = p(ES) = S/(Km + S)
    with Km = (km1 + kcat)/k1 (Briggs & Haldane, Biochem. J. 19 (1925) 338)."""
    s = Scheme()
    for name, v in (("k1", k1), ("km1", km1), ("kcat", kcat)):
        s.add_parameter(name, value=v)
    s.add_input("S", value=1.0)
    s.add_edge("E", "ES", "k1*S")
    s.add_edge("ES", "E", "km1 + kcat")
    s.add_observable("v", {"ES": 1.0})
    return s, (km1 + kcat) / k1


def sequential_sites(K):
    """P0 <-> P1 <-> ... <-> Pm, one ligand per step with dissociation constant K[i]."""
    s = Scheme()
    s.add_input("c", value=1.0)
    for i, Ki in enumerate(K):
        s.add_parameter(f"on{i}", value=1.0)
        s.add_parameter(f"off{i}", value=Ki)
        s.add_edge(f"P{i}", f"P{i + 1}", f"on{i}*c")
        s.add_edge(f"P{i + 1}", f"P{i}", f"off{i}")
    return s


def voltage_gate(z=2.0, a0=0.5, b0=2.0, states=3):
    """C1 <-> C2 <-> ... <-> O with a0 exp(zV/25.7) forward and b0 exp(-zV/25.7) back."""
    s = Scheme()
    for name, v in (("a0", a0), ("b0", b0), ("z", z)):
        s.add_parameter(name, value=v)
    s.add_input("V", value=-60.0, min=-120.0, max=60.0)
    names = [f"C{i + 1}" for i in range(states - 1)] + ["O"]
    for a, b in zip(names, names[1:]):
        s.add_edge(a, b, "a0*exp(z*V/25.7)")
        s.add_edge(b, a, "b0*exp(-z*V/25.7)")
    s.add_observable("open", {"O": 1.0})
    return s


# ------------------------------------------------------------------ Hill and Michaelis–Menten

@pytest.mark.parametrize("n", [1, 2, 4])
@pytest.mark.parametrize("span", [3.0, 1e4])
def test_hill_function_scheme_gives_exact_hill_and_ec50(n, span):
    # p = c^n/(K^n + c^n) (Hill 1910): EC_q = K (q/(1-q))^(1/n), so
    # ln 81 / ln(EC90/EC10) = n exactly (Goldbeter & Koshland, PNAS 78 (1981) 6840),
    # whatever the range, once the curve is normalized to its limits 0 and 1.
    s, K = all_or_none(n)
    r = response_curve(compile_scheme(s), observable="bound", input="c", lo=K / span, hi=K * span)
    assert r["normalization"] == "limits" and r["monotone"] is True
    assert r["limits"]["lower"]["value"] == 0.0 and r["limits"]["lower"]["established"]
    assert r["limits"]["upper"]["value"] == pytest.approx(1.0, abs=1e-14)
    assert r["ec50"] == pytest.approx(K, rel=1e-9)
    for q in (0.1, 0.9):
        assert r[f"ec{int(100 * q)}"] == pytest.approx(K * (q / (1 - q)) ** (1 / n), rel=1e-9)
    assert r["hill_effective"] == pytest.approx(n, rel=1e-9)
    assert r["hill_fit"]["n"] == pytest.approx(n, rel=1e-6)
    assert r["hill_fit"]["K"] == pytest.approx(K, rel=1e-6)
    x = np.array(r["curve"]["x"])
    np.testing.assert_allclose(r["curve"]["y_normalized"], x ** n / (K ** n + x ** n), rtol=1e-13)
    # d/d ln c of the Hill function peaks at c = K with value n/4 (derived from the Hill form)
    assert r["max_log_slope"] == pytest.approx(n / 4, rel=1e-8)
    assert r["saturated"] is (span > 100)


def test_hill_inhibition_is_the_mirror_image():
    # p(E) = K^n/(K^n + c^n) = 1 - Hill: same EC50, n_H = -n (common practice for inhibition)
    s, K = all_or_none(3)
    r = response_curve(compile_scheme(s), observable="free", input="c", lo=K / 10, hi=K * 10)
    assert r["direction"] == "decreasing" and r["monotone"]
    assert r["ec50"] == pytest.approx(K, rel=1e-9)
    assert r["hill_effective"] == pytest.approx(-3.0, rel=1e-9)
    assert r["ec10"] > r["ec90"]


def test_michaelis_menten_reports_hill_one_and_the_true_km():
    # Briggs–Haldane: v/Vmax = S/(Km + S); EC50 = Km, EC10 = Km/9, EC90 = 9 Km, n_H = 1.
    s, Km = michaelis_menten()
    m = compile_scheme(s)
    r = response_curve(m, observable="v", input="S", lo=0.01, hi=1000)
    assert r["ec50"] == pytest.approx(Km, rel=1e-6)
    assert r["ec50"] == pytest.approx(Km, rel=1e-12)
    assert r["hill_effective"] == pytest.approx(1.0, abs=1e-6)
    assert r["hill_fit"]["n"] == pytest.approx(1.0, abs=1e-6)
    assert r["hill_fit"]["K"] == pytest.approx(Km, rel=1e-6)
    assert r["saturated"] is True and r["warnings"] == []
    # The old behaviour, normalized to the scanned range, is still there and labelled:
    # there EC_q solves S/(Km+S) = f(lo) + q (f(hi) - f(lo)) (closed form of the same curve).
    g = response_curve(m, observable="v", input="S", lo=0.01, hi=1000, normalization="range")
    assert g["normalization"] == "range"
    f = lambda c: c / (Km + c)  # noqa: E731
    ec = {}
    for q in (0.1, 0.5, 0.9):
        t = f(0.01) + q * (f(1000) - f(0.01))
        ec[q] = Km * t / (1 - t)
        assert g[f"ec{int(100 * q)}"] == pytest.approx(ec[q], rel=1e-10)
    assert g["hill_effective"] == pytest.approx(math.log(81) / math.log(ec[0.9] / ec[0.1]), rel=1e-9)
    assert abs(g["hill_effective"] - 1.0) > 1e-3          # the range bends it away from 1


def test_michaelis_menten_over_a_narrow_range():
    # A range of a factor 4 around Km: normalized to the limits 0 and Vmax, EC50 is
    # still Km and n_H still 1 (Briggs–Haldane), but the curve is far from saturated.
    s, Km = michaelis_menten(k1=0.7, km1=11.0, kcat=3.0)
    r = response_curve(compile_scheme(s), observable="v", input="S", lo=Km / 2, hi=2 * Km, points=21)
    assert r["ec50"] == pytest.approx(Km, rel=1e-10)
    assert r["ec10"] == pytest.approx(Km / 9, rel=1e-10) and r["ec90"] == pytest.approx(9 * Km, rel=1e-10)
    assert r["hill_effective"] == pytest.approx(1.0, abs=1e-9)
    assert r["saturated"] is False
    # ŷ(lo) = 1/3 and 1 - ŷ(hi) = 1/3: the distances from the limits
    assert r["unreached"]["lower"] == pytest.approx(1 / 3, rel=1e-12)
    assert r["unreached"]["upper"] == pytest.approx(1 / 3, rel=1e-12)
    assert any("not saturated" in w for w in r["warnings"])


def test_a_range_starting_at_zero_is_linear_and_exact():
    # a concentration of 0 removes the binding edge: v(0) = 0 exactly; EC50 = Km (Briggs–Haldane)
    s, Km = michaelis_menten()
    r = response_curve(compile_scheme(s), observable="v", input="S", lo=0.0, hi=100.0, points=41)
    assert r["spacing"] == "linear"
    np.testing.assert_array_equal(r["curve"]["x"], np.linspace(0.0, 100.0, 41))
    assert r["curve"]["y"][0] == 0.0
    assert r["ec50"] == pytest.approx(Km, rel=1e-10)
    assert r["hill_effective"] == pytest.approx(1.0, abs=1e-9)
    # dŷ/dS = Km/(Km + S)^2 is steepest at S = 0 (one-sided difference there)
    assert r["max_slope"] == pytest.approx(1 / Km, rel=1e-8)
    assert r["max_slope_at"] == pytest.approx(0.0, abs=1e-6)


def test_a_limit_that_cannot_be_established_is_flagged_not_assumed():
    # rate k log(1 + c): p = L/(L + d), L = k log(1+c), creeps to 1 like 1/log c and is
    # still 1e-3 away at c = 1e300, so the upper limit is not established.
    s = Scheme()
    s.add_parameter("k", value=1.0)
    s.add_parameter("d", value=1.0)
    s.add_input("c", value=1.0)
    s.add_edge("A", "B", "k*log(1 + c)")
    s.add_edge("B", "A", "d")
    r = response_curve(compile_scheme(s), observable="B", input="c", lo=0.1, hi=10.0)
    assert r["limits"]["upper"]["established"] is False and r["limits"]["upper"]["value"] is None
    assert r["limits"]["lower"]["established"] is True and r["limits"]["lower"]["value"] == 0.0
    assert r["normalization"] == "range"
    assert r["saturated"] is False
    assert any("could not be established" in w for w in r["warnings"])
    # normalized to the range: ŷ runs from 0 to 1 over the grid
    assert min(r["curve"]["y_normalized"]) == 0.0 and max(r["curve"]["y_normalized"]) == 1.0


# ------------------------------------------------------------------ bell-shaped curves

def test_middle_state_of_two_sequential_steps_is_a_bell():
    # E <-> EL <-> EL2 with dissociation constants K1, K2:
    # p(EL) = (c/K1)/(1 + c/K1 + c^2/(K1 K2)) peaks at c* = sqrt(K1 K2) with height
    # 1/(2 + sqrt(K1/K2)); half-height where (c/K1)/(...) = peak/2 (derived from the closed form).
    K1, K2 = 2.0, 50.0
    m = compile_scheme(sequential_sites([K1, K2]))
    r = response_curve(m, observable="P1", input="c", lo=1e-2, hi=1e4)
    assert r["monotone"] is False
    cstar = math.sqrt(K1 * K2)
    height = (cstar / K1) / (2 + cstar / K1)
    assert r["peak"]["x"] == pytest.approx(cstar, rel=1e-9)
    assert r["peak"]["y"] == pytest.approx(height, rel=1e-13)
    assert r["peak"]["kind"] == "maximum" and r["peak"]["in_range"] is True
    # limits 0 at both ends: half-points solve c/K1 = (h/2)(1 + c/K1 + c^2/(K1 K2))
    a, b, cc = height / 2 / (K1 * K2), height / 2 / K1 - 1 / K1, height / 2
    disc = math.sqrt(b * b - 4 * a * cc)
    rising, falling = (-b - disc) / (2 * a), (-b + disc) / (2 * a)
    assert r["half_points"]["rising"] == pytest.approx(rising, rel=1e-10)
    assert r["half_points"]["falling"] == pytest.approx(falling, rel=1e-10)
    for key in ("ec10", "ec50", "ec90", "hill_effective", "hill_fit"):
        assert r[key] is None
    assert any("not monotone" in w and "no EC levels" in w for w in r["warnings"])


def test_middle_state_of_three_sites_against_the_closed_form():
    # P0..P3, stepwise constants K1..K3: p(P1) = a1 c / (1 + a1 c + a2 c^2 + a3 c^3),
    # a1 = 1/K1, a2 = 1/(K1 K2), a3 = 1/(K1 K2 K3); dp/dc = 0 ⇔ 2 a3 c^3 + a2 c^2 - 1 = 0
    # (derived from the closed form), solved with mpmath at 50 digits.
    K = [0.3, 4.0, 20.0]
    m = compile_scheme(sequential_sites(K))
    r = response_curve(m, observable="P1", input="c", lo=1e-3, hi=1e3)
    with mpmath.workdps(50):
        a1 = 1 / mpmath.mpf(K[0])
        a2 = a1 / K[1]
        a3 = a2 / K[2]
        roots = mpmath.polyroots([2 * a3, a2, 0, -1], maxsteps=200, extraprec=200)
        cstar = [x.real for x in roots if abs(x.imag) < 1e-30 and x.real > 0][0]
        p1 = lambda c: a1 * c / (1 + a1 * c + a2 * c ** 2 + a3 * c ** 3)  # noqa: E731
        height = p1(cstar)
        # half-height: (h/2) a3 c^3 + (h/2) a2 c^2 + (h/2 - 1) a1 c + h/2 = 0, two positive roots
        h2 = height / 2
        half = mpmath.polyroots([h2 * a3, h2 * a2, (h2 - 1) * a1, h2], maxsteps=200, extraprec=200)
        rising, falling = sorted(x.real for x in half if abs(x.imag) < 1e-30 and x.real > 0)
    assert r["monotone"] is False
    assert r["peak"]["x"] == pytest.approx(float(cstar), rel=1e-9)
    assert r["peak"]["y"] == pytest.approx(float(height), rel=1e-13)
    assert r["half_points"]["rising"] == pytest.approx(float(rising), rel=1e-10)
    assert r["half_points"]["falling"] == pytest.approx(float(falling), rel=1e-10)
    assert r["hill_effective"] is None and r["hill_fit"] is None
    # identical independent sites (K = K0 for every site, statistical factors in the rates)
    # put the P1 maximum at c = K0/2 with height 4/9 (binomial occupancy, common practice)
    s = Scheme()
    s.add_input("c", value=1.0)
    s.add_parameter("K0", value=3.0)
    for i in range(3):
        s.add_edge(f"P{i}", f"P{i + 1}", f"{3 - i}*c")
        s.add_edge(f"P{i + 1}", f"P{i}", f"{i + 1}*K0")
    b = response_curve(compile_scheme(s), observable="P1", input="c", lo=1e-3, hi=1e3)
    assert b["peak"]["x"] == pytest.approx(1.5, rel=1e-9)
    assert b["peak"]["y"] == pytest.approx(4 / 9, rel=1e-13)


def test_a_peak_beyond_the_range_is_found_and_said():
    # Only the rising flank of p(EL) is scanned; its limits (0 at both ends) show the curve
    # turns: monotone over the range, not over the domain (closed form as above).
    K1, K2 = 2.0, 50.0
    m = compile_scheme(sequential_sites([K1, K2]))
    r = response_curve(m, observable="P1", input="c", lo=1e-4, hi=1.0)
    assert r["monotone_in_range"] is True and r["monotone"] is False
    assert r["peak"]["in_range"] is False
    assert r["peak"]["x"] == pytest.approx(math.sqrt(K1 * K2), rel=1e-9)
    assert any("outside the range" in w for w in r["warnings"])


# ------------------------------------------------------------------ signed inputs

def test_voltage_gate_over_a_signed_range_against_mpmath():
    # C1 <-> C2 <-> O with a0 exp(±zV/25.7): linear grid over [-120, 60]; every value
    # against a 50-digit mpmath solve of the same master equation.
    z, a0, b0 = 1.5, 0.5, 2.0
    m = compile_scheme(voltage_gate(z=z, a0=a0, b0=b0))
    r = response_curve(m, observable="open", input="V", lo=-120.0, hi=60.0, points=37)
    assert r["spacing"] == "linear" and r["domain"] == "signed"
    x = np.array(r["curve"]["x"])
    np.testing.assert_array_equal(x, np.linspace(-120.0, 60.0, 37))

    def p_open(V):
        with mpmath.workdps(50):
            f = mpmath.mpf(a0) * mpmath.exp(z * mpmath.mpf(V) / mpmath.mpf("25.7"))
            b = mpmath.mpf(b0) * mpmath.exp(-z * mpmath.mpf(V) / mpmath.mpf("25.7"))
            p = mp_steady_state(3, [(0, 1), (1, 0), (1, 2), (2, 1)], [f, b, f, b], floats=False)
            return p[2]

    ref = np.array([float(p_open(v)) for v in x])
    np.testing.assert_allclose(r["curve"]["y"], ref, rtol=1e-13)
    # limits at -inf and +inf are 0 and 1 (the forward/back ratio runs over (0, ∞))
    assert r["limits"]["lower"]["at"] == "-inf" and r["limits"]["upper"]["at"] == "+inf"
    assert r["limits"]["lower"]["value"] == pytest.approx(0.0, abs=1e-15)
    assert r["limits"]["upper"]["value"] == pytest.approx(1.0, abs=1e-15)
    assert r["normalization"] == "limits" and r["monotone"] and r["saturated"]
    with mpmath.workdps(50):
        v50 = mpmath.findroot(lambda v: p_open(v) - mpmath.mpf(1) / 2, r["ec50"] + 1.0)
    assert r["ec50"] == pytest.approx(float(v50), rel=1e-10)
    # the upper tail stops before exp(zV/25.7) leaves float64 (exp overflows above 709.78)
    assert 60.0 < r["limits"]["upper"]["evaluated_at"] <= 709.78 * 25.7 / z
    assert r["max_log_slope"] is None and r["max_log_slope_at"] is None
    assert r["hill_effective"] is None and r["hill_fit"] is None
    assert r["logistic_fit"]["x_half"] == pytest.approx(r["ec50"], rel=0.1)
    assert any("signed input" in w for w in r["warnings"])


def test_two_state_gate_is_an_exact_boltzmann():
    # C <-> O: p_O = 1/(1 + (b0/a0) exp(-2zV/25.7)), the Boltzmann form with
    # V_half = 25.7 ln(b0/a0)/(2z) and slope factor 25.7/(2z) (common practice);
    # the steepest dp/dV is 1/(4 s) at V_half.
    z, a0, b0 = 2.0, 0.5, 2.0
    m = compile_scheme(voltage_gate(z=z, a0=a0, b0=b0, states=2))
    r = response_curve(m, observable="open", input="V", lo=-120.0, hi=60.0)
    vh, sf = 25.7 * math.log(b0 / a0) / (2 * z), 25.7 / (2 * z)
    assert r["ec50"] == pytest.approx(vh, rel=1e-12)
    assert r["ec10"] == pytest.approx(vh - sf * math.log(9), rel=1e-11)
    assert r["ec90"] == pytest.approx(vh + sf * math.log(9), rel=1e-11)
    assert r["logistic_fit"]["x_half"] == pytest.approx(vh, rel=1e-9)
    assert r["logistic_fit"]["slope_factor"] == pytest.approx(sf, rel=1e-9)
    assert r["max_slope"] == pytest.approx(1 / (4 * sf), rel=1e-8)
    assert r["max_slope_at"] == pytest.approx(vh, abs=1e-3)


def test_a_parameter_swept_as_input_approaches_zero():
    # v = k1 S/(k1 S + km1 + kcat) as a function of k1: a Hill curve of n = 1 with
    # K = (km1 + kcat)/S (Briggs–Haldane rearranged); k1 cannot be 0, so its lower
    # limit is approached, not evaluated.
    s, _ = michaelis_menten(km1=3.0, kcat=1.0)
    r = response_curve(compile_scheme(s), observable="v", input="k1", lo=0.1, hi=10.0,
                       values={"S": 2.0})
    assert r["domain"] == "positive"
    assert r["limits"]["lower"]["established"] and r["limits"]["lower"]["evaluated_at"] < 1e-290
    assert r["limits"]["lower"]["value"] == pytest.approx(0.0, abs=1e-290)
    assert r["ec50"] == pytest.approx(2.0, rel=1e-10)
    assert r["hill_effective"] == pytest.approx(1.0, abs=1e-9)


def test_signed_ranges_are_refused_for_concentrations():
    s, _ = michaelis_menten()
    m = compile_scheme(s)
    with pytest.raises(EvaluationError, match=r"bad range -1:10: input 'S' cannot be negative"):
        response_curve(m, observable="v", input="S", lo=-1.0, hi=10.0)
    with pytest.raises(EvaluationError, match="log spacing needs 0 < LO"):
        response_curve(m, observable="v", input="S", lo=0.0, hi=10.0, spacing="log")
    with pytest.raises(EvaluationError, match="normalization must be one of limits, range"):
        response_curve(m, observable="v", input="S", lo=1.0, hi=10.0, normalization="max")


def test_summaries_of_many_rows_agree_with_single_curves():
    # response_summaries (used by sampling) gives each row what response_curve gives it
    K = [2.0, 50.0]
    m = compile_scheme(sequential_sites(K))
    base = m.as_array({"off0": np.array([2.0, 0.5, 8.0]), "c": 1.0})
    s = response_summaries(m, base, observable="P2", input="c", lo=1e-3, hi=1e3, points=31)
    for i in range(3):
        one = response_curve(m, observable="P2", input="c", lo=1e-3, hi=1e3, points=31,
                             values={"off0": float(base[i, m.symbols.index("off0")])})
        for key in ("ec10", "ec50", "ec90", "hill_effective", "max_log_slope"):
            assert s[key][i] == pytest.approx(one[key], rel=1e-12)
        assert bool(s["saturated"][i]) is one["saturated"]
    # the fully bound state of two sequential steps, normalized to its limits 0 and 1:
    # p2 = 1/2 ⇔ c^2/(K1 K2) = 1 + c/K1 ⇔ c^2 - K2 c - K1 K2 = 0 (from the closed form)
    K1 = base[:, m.symbols.index("off0")]
    ec50 = (K[1] + np.sqrt(K[1] ** 2 + 4 * K1 * K[1])) / 2
    np.testing.assert_allclose(s["ec50"], ec50, rtol=1e-10)


# ------------------------------------------------------------------ command line

MM_TOML = """
name = "invented enzyme"
[parameters]
k1 = { value = 2.0 }
kback = { value = 4.0 }
[inputs]
S = { value = 1.0 }
[[edges]]
source = "E"
target = "ES"
rate = "k1*S"
[[edges]]
source = "ES"
target = "E"
rate = "kback"
[observables]
v = { "ES" = 1.0 }
"""

GATE_TOML = """
name = "invented gate"
[parameters]
a0 = { value = 0.5 }
b0 = { value = 2.0 }
[inputs]
V = { value = -60.0, min = -120.0, max = 60.0 }
[[edges]]
source = "C"
target = "O"
rate = "a0*exp(2*V/25.7)"
[[edges]]
source = "O"
target = "C"
rate = "b0*exp(-2*V/25.7)"
"""


def test_cli_prints_every_warning_and_labels_the_normalization(tmp_path, capsys):
    path = tmp_path / "mm.toml"
    path.write_text(MM_TOML)
    argv = ["response", str(path), "--observable", "v", "--input", "S", "--range", "1:4"]
    assert main(argv + ["--json"]) == 0
    r = json.loads(capsys.readouterr().out)
    assert r["normalization"] == "limits" and r["monotone"] is True and r["saturated"] is False
    assert r["ec50"] == pytest.approx(2.0, rel=1e-10)          # Km = kback/k1 (single-site form)
    assert r["warnings"]
    assert main(argv) == 0
    text = capsys.readouterr().out
    for w in r["warnings"]:
        assert w in text
    assert "model predictions" in text and "normalized to its limits" in text
    assert main(argv + ["--normalize", "range", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["normalization"] == "range"


def test_cli_signed_range_and_plot(tmp_path, capsys):
    path = tmp_path / "gate.toml"
    path.write_text(GATE_TOML)
    png = tmp_path / "gate.png"
    # "-120:60" as its own argument (not only --range=-120:60)
    assert main(["response", str(path), "--observable", "O", "--input", "V", "--range", "-120:60",
                 "--plot", str(png), "--json"]) == 0
    r = json.loads(capsys.readouterr().out)
    assert r["spacing"] == "linear" and r["curve"]["x"][0] == -120.0
    assert r["ec50"] == pytest.approx(25.7 * math.log(4.0) / 4.0, rel=1e-12)   # Boltzmann V_half
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["gate.png", "gate.toml"]  # no temporaries
