"""The fit's evaluation path (one prebuilt array, measured entries picked by
index, remembered points) gives the estimates of independent references:

- noise-free Michaelis–Menten data (Michaelis & Menten 1913; Briggs &
  Haldane 1925 for the steady-state form; the product-release step as in
  the header of examples/enzyme_velocity.toml, derived by hand, common
  practice) are fitted back to the values they came from;
- on noisy data, scipy.optimize.least_squares run directly on the model's
  steady state with a finite-difference Jacobian finds the same optimum, and
  the standard errors equal s²(JᵀJ)⁻¹ (Bates & Watts 1988, §2.3) with J from
  the closed-form velocity;
- the residual Jacobian of state, observable and mixed columns (with empty
  cells) equals central differences of the residuals;
- refusals and the recompute of rows the straight-line kernel does not
  trust (a zero concentration) are unchanged.

All data are invented (closed forms at chosen values, seeded noise).
"""

from pathlib import Path

import numpy as np
import pytest
from scipy.optimize import least_squares

from treeflux.compiler import compile_scheme, load
from treeflux.runtime.errors import EvaluationError
from treeflux.runtime.fitting import _Problem, fit

EXAMPLE = Path(__file__).resolve().parent.parent / "examples" / "enzyme_velocity.toml"
K_OFF, K_REL, E0 = 20.0, 150.0, 0.05          # the example's fixed values
S = np.array([0.5, 1, 2, 5, 10, 20, 50, 100, 200, 500.0])


@pytest.fixture(scope="module")
def enzyme():
    return compile_scheme(load(EXAMPLE), jacobian=True)


def vmax_km(k_cat, k_on):
    """Briggs–Haldane constants with a product-release step (header of the example)."""
    Vmax = E0 * k_cat * K_REL / (k_cat + K_REL)
    Km = (K_OFF + k_cat) / k_on * K_REL / (k_cat + K_REL)
    return Vmax, Km


def michaelis_menten(k_cat, k_on, s=S):
    Vmax, Km = vmax_km(k_cat, k_on)
    return Vmax * s / (Km + s)


def test_noise_free_michaelis_menten_data_give_back_vmax_and_km(enzyme):
    # velocities from the closed form v = Vmax·S/(Km + S), not from the model
    k_cat, k_on = 14.0, 0.8
    r = fit(enzyme, {"S": S, "velocity": michaelis_menten(k_cat, k_on)}, values={"E0": E0}, starts=3)
    got = r["parameters"]
    assert got["k_cat"] == pytest.approx(k_cat, rel=1e-8)
    assert got["k_on"] == pytest.approx(k_on, rel=1e-8)
    for a, b in zip(vmax_km(got["k_cat"], got["k_on"]), vmax_km(k_cat, k_on)):
        assert a == pytest.approx(b, rel=1e-8)
    assert r["cost"] < 1e-20 and r["success"]
    assert r["jacobian"] == "compiled" and r["identifiability"]["unidentifiable"] == []


def _noisy(seed=7):
    rng = np.random.default_rng(seed)
    v = michaelis_menten(14.0, 0.8) * (1 + 0.03 * rng.standard_normal(S.size))
    return v, 0.03 * v


def test_fit_matches_scipy_on_the_steady_state_with_finite_differences(enzyme):
    v, sigma = _noisy()
    r = fit(enzyme, {"S": S, "velocity": v, "sigma_velocity": sigma}, values={"E0": E0}, starts=3)
    # reference: least_squares on ln(k_cat, k_on), the velocity k_cat·E0·p(ES) from the
    # model's steady state, forward differences (scipy's "2-point")
    es = enzyme.states.index("ES")

    def residuals(u):
        k_cat, k_on = np.exp(u)
        P = enzyme.steady_state({"S": S, "E0": E0, "k_cat": k_cat, "k_on": k_on})
        return (k_cat * E0 * P[:, es] - v) / sigma
    lo, hi = np.log([0.01, 0.01]), np.log([1000.0, 100.0])
    ref = least_squares(residuals, np.log([8.0, 1.5]), jac="2-point", bounds=(lo, hi), method="trf",
                        xtol=1e-14, ftol=1e-14, gtol=1e-14)
    k_cat, k_on = np.exp(ref.x)
    assert r["parameters"]["k_cat"] == pytest.approx(k_cat, rel=1e-6)
    assert r["parameters"]["k_on"] == pytest.approx(k_on, rel=1e-6)
    assert r["cost"] == pytest.approx(ref.cost, rel=1e-9)
    # standard errors: s²(JᵀJ)⁻¹ with J the closed-form ∂r/∂ln θ at the estimate (Bates & Watts §2.3)
    k_cat, k_on = r["parameters"]["k_cat"], r["parameters"]["k_on"]
    Vmax, Km = vmax_km(k_cat, k_on)
    y = Vmax * S / (Km + S)
    dy_dlnKm = -y * Km / (Km + S)
    dlnVmax = K_REL / (k_cat + K_REL)                        # ∂ln Vmax/∂ln k_cat
    dlnKm = k_cat / (K_OFF + k_cat) - k_cat / (k_cat + K_REL)  # ∂ln Km/∂ln k_cat (∂/∂ln k_on = −1)
    J = np.stack([y * dlnVmax + dy_dlnKm * dlnKm, -dy_dlnKm], axis=1) / sigma[:, None]
    res = (y - v) / sigma
    s2 = res @ res / (S.size - 2)
    se = np.sqrt(np.diag(s2 * np.linalg.inv(J.T @ J)))
    assert r["log_uncertainties"]["k_cat"] == pytest.approx(se[0], rel=1e-6)
    assert r["log_uncertainties"]["k_on"] == pytest.approx(se[1], rel=1e-6)


def _problem(model, data, values, free):
    """The fit's evaluator on the data as fit() lays them out (through fit's own helpers)."""
    from treeflux.runtime import fitting

    fixed_cols, obs_cols, sig_cols = fitting._classify(model, data, values)
    n = len(next(iter(data.values())))
    X = model.as_array({**values, **fixed_cols})
    X = np.ascontiguousarray(np.broadcast_to(X, (n, X.shape[1])))
    obs_names = model.observable_names
    cols, Y, Sg = [], [], []
    for o, col in obs_cols.items():
        mask = np.isfinite(col)
        k = obs_names.index(o) if o in obs_names else model.states.index(o)
        cols.append((o in obs_names, k, mask))
        Y.append(col[mask])
        Sg.append(sig_cols.get(o, np.ones(n))[mask])
    return _Problem(model, X, [model.symbols.index(p) for p in free], cols,
                    np.concatenate(Y), np.concatenate(Sg))


@pytest.mark.parametrize("columns", [("velocity",), ("ES",), ("ES", "velocity", "saturation")])
@pytest.mark.parametrize("log_jacobian", [False, True])
def test_residual_jacobian_equals_central_differences(columns, log_jacobian):
    m = compile_scheme(load(EXAMPLE), jacobian=True, log_jacobian=log_jacobian)
    truth = {"S": S, "E0": E0, "k_cat": 14.0, "k_on": 0.8}
    P, O = m.steady_state(truth), m.observables(truth)
    data = {"S": S}
    for c in columns:
        col = (O[:, m.observable_names.index(c)] if c in m.observable_names
               else P[:, m.states.index(c)]).copy()
        col[3] = np.nan                                        # an empty cell: not measured
        data[c] = col * 1.1
    problem = _problem(m, data, {"E0": E0}, ["k_on", "k_cat"])
    u = np.log([0.5, 9.0])
    r = problem.residuals(u)
    first = r.copy()
    # the residuals against the public calls, row by row
    X = {"S": S, "E0": E0, "k_on": 0.5, "k_cat": 9.0}
    Pm, Om = m.steady_state(X), m.observables(X)
    expect = np.concatenate([np.delete(Om[:, m.observable_names.index(c)] if c in m.observable_names
                                       else Pm[:, m.states.index(c)], 3) - np.delete(data[c], 3)
                             for c in columns])
    np.testing.assert_allclose(r, expect, rtol=1e-13, atol=1e-16)
    h = 1e-6
    central = np.stack([(problem.residuals(u + e) - problem.residuals(u - e)) / (2 * h)
                        for e in np.eye(2) * h], axis=1)
    np.testing.assert_allclose(problem.jacobian(u), central, rtol=1e-7, atol=1e-9 * np.abs(central).max())
    # remembered points hand out copies: changing one does not change the next answer
    r[:] = 0.0
    np.testing.assert_array_equal(problem.residuals(u), first)


def test_a_zero_concentration_row_is_recomputed_not_refused(enzyme):
    # S = 0 removes the edge E->ES: that row leaves the straight-line kernel for the looped
    # path; its velocity is 0 exactly (no substrate, no turnover: common practice)
    s = np.concatenate([[0.0], S])
    v = michaelis_menten(14.0, 0.8, s)
    r = fit(enzyme, {"S": s, "velocity": v}, values={"E0": E0})
    assert r["parameters"]["k_cat"] == pytest.approx(14.0, rel=1e-8)
    assert r["parameters"]["k_on"] == pytest.approx(0.8, rel=1e-8)


def test_fewer_values_than_parameters_name_the_unidentifiable_direction(enzyme):
    # one velocity cannot fix two parameters: one null direction, reported, no standard errors
    r = fit(enzyme, {"S": [10.0], "velocity": [0.3]}, values={"E0": E0})
    ident = r["identifiability"]
    assert len(ident["singular_values"]) == 2 and len(ident["unidentifiable"]) == 1
    assert r["uncertainties"] == {"k_on": None, "k_cat": None}


def test_refusals_unchanged(enzyme):
    v, sigma = _noisy()
    with pytest.raises(EvaluationError, match="column sigma_velocity: row 2 needs a positive standard deviation"):
        fit(enzyme, {"S": S, "velocity": v, "sigma_velocity": np.where(S == 1, 0.0, sigma)}, values={"E0": E0})
    with pytest.raises(EvaluationError, match="data column 'S' has an empty or non-finite cell"):
        fit(enzyme, {"S": np.where(S == 2, np.nan, S), "velocity": v}, values={"E0": E0})
    with pytest.raises(EvaluationError, match="data column 'speed' is neither"):
        fit(enzyme, {"S": S, "speed": v}, values={"E0": E0})
    with pytest.raises(EvaluationError, match=r"row 3: input 'S' must be non-negative, got -1\.0"):
        fit(enzyme, {"S": np.where(S == 5, -1.0, S), "velocity": v}, values={"E0": E0})
    with pytest.raises(EvaluationError, match="starts must be a positive integer"):
        fit(enzyme, {"S": S, "velocity": v}, values={"E0": E0}, starts=0)
    with pytest.raises(EvaluationError, match="no free parameters"):
        fit(enzyme, {"S": S, "velocity": v}, values={"E0": E0, "k_cat": 1.0, "k_on": 1.0})


def test_profiles_with_the_compiled_jacobian_match_forward_differences(enzyme):
    from scipy.stats import chi2

    from treeflux.runtime.fitting import profile_interval

    v, sigma = _noisy()
    data = {"S": S, "velocity": v, "sigma_velocity": sigma}
    r = fit(enzyme, data, values={"E0": E0}, profile=["k_cat"])
    prof = r["profiles"]["k_cat"]
    # the threshold is half the 95 % quantile of chi-square with one degree of freedom (scipy.stats) times s²
    assert prof["threshold_delta_cost"] == pytest.approx(0.5 * chi2.ppf(0.95, 1) * r["residual_variance"],
                                                         rel=1e-13)
    problem = _problem(enzyme, data, {"E0": E0}, ["k_on", "k_cat"])
    u = np.log([r["parameters"]["k_on"], r["parameters"]["k_cat"]])
    lo, hi = np.log([0.01, 0.01]), np.log([100.0, 1000.0])
    by_differences = profile_interval(problem.residuals, u, lo, hi, 1, r["residual_variance"],
                                      r["log_uncertainties"]["k_cat"], ["k_on", "k_cat"])
    assert prof["lower"] == pytest.approx(by_differences["lower"], rel=1e-7)
    assert prof["upper"] == pytest.approx(by_differences["upper"], rel=1e-7)
    # near-linear here: the profile interval is close to the Wald interval
    assert prof["lower"] == pytest.approx(prof["wald_interval"][0], rel=2e-3)
    assert prof["upper"] == pytest.approx(prof["wald_interval"][1], rel=2e-3)


def test_data_without_a_measured_value_are_refused(enzyme):
    # every observable cell empty: nothing to fit (a fit used to return the starting values)
    with pytest.raises(EvaluationError, match="no measured values: every cell of 'velocity' is empty"):
        fit(enzyme, {"S": [1.0, 2.0], "velocity": [np.nan, np.nan]}, values={"E0": E0})


@pytest.mark.parametrize("options", [dict(method="numeric"), dict(backend="llvm", jacobian=True), dict()])
def test_every_evaluation_path_recovers_michaelis_menten(options):
    # the looped numeric path (no straight-line kernel), a native kernel with the compiled
    # Jacobian, and a kernel without derivatives (forward differences, central at the end)
    m = compile_scheme(load(EXAMPLE), **options)
    r = fit(m, {"S": S, "velocity": michaelis_menten(14.0, 0.8)}, values={"E0": E0})
    assert r["jacobian"] == ("compiled" if options.get("jacobian") else "central differences")
    # noise-free data: the residuals vanish at the truth, whatever the Jacobian's accuracy
    assert r["parameters"]["k_cat"] == pytest.approx(14.0, rel=1e-10)
    assert r["parameters"]["k_on"] == pytest.approx(0.8, rel=1e-10)
