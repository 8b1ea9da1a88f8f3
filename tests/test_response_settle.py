"""The limit search of response curves stops once a curve has settled.

Past the dense steps (12 decades beyond the range), a row stops walking when
its last three values agree to the limit tolerance and are not near 0; the
farthest value is the limit. These tests check the settled limits against
closed forms, that a curve still changing at the end of the dense steps walks
on and finds its far transition, and that summaries equal those of the full
walk to the float64 edge.
"""

from __future__ import annotations

import numpy as np
import pytest

from treeflux.compiler import Scheme, compile_scheme
from treeflux.runtime import response_domain
from treeflux.runtime.analysis import response_curve, response_summaries

from .test_response_honest import michaelis_menten, sequential_sites


def test_michaelis_menten_upper_limit_settles_early_and_is_vmax():
    # v/Vmax = S/(Km + S) (Briggs & Haldane 1925): the limit at S -> inf is 1;
    # 12 decades beyond the range, S/(Km + S) = 1 - O(1e-12).
    s, km = michaelis_menten(k1=2.0, km1=3.0, kcat=1.0)
    r = response_curve(compile_scheme(s), observable="v", input="S", lo=1e-2, hi=1e2)
    up = r["limits"]["upper"]
    assert up["established"]
    assert up["value"] == pytest.approx(1.0, abs=1e-12)
    assert 1e13 < up["evaluated_at"] < 1e20          # stopped after the dense steps
    assert r["ec50"] == pytest.approx(km, rel=1e-11)
    assert r["hill_effective"] == pytest.approx(1.0, abs=1e-9)


def test_a_limit_of_zero_is_followed_to_the_float64_edge():
    # p(E) = Km/(Km + S) -> 0 as S -> inf (same closed form): a vanishing
    # observable is not stopped at its last small value.
    s, km = michaelis_menten()
    s.add_observable("free", {"E": 1.0})
    r = response_curve(compile_scheme(s), observable="free", input="S", lo=1e-2, hi=1e2)
    up = r["limits"]["upper"]
    assert up["established"] and up["value"] == pytest.approx(0.0, abs=1e-250)


def test_a_curve_still_changing_walks_on_to_its_far_transition():
    # P0 <-> P1 <-> P2 with K = 1 and 1e20: the fraction with two ligands,
    # p2 = c^2/(K1 K2 + K1 c + c^2) (sequential binding, common practice), is
    # still 1e-6-ish 12 decades past the range [1e-2, 1e2] and rises to 1 at
    # c ~ 1e20, so its upper limit is 1, found beyond the dense steps.
    s = sequential_sites([1.0, 1e20])
    s.add_observable("two", {"P2": 1.0})
    r = response_curve(compile_scheme(s), observable="two", input="c", lo=1e-2, hi=1e2)
    up = r["limits"]["upper"]
    assert up["established"]
    assert up["value"] == pytest.approx(1.0, abs=1e-11)
    assert up["evaluated_at"] > 1e30


def test_summaries_equal_the_full_walk(monkeypatch):
    # The settled search must give the same summaries as walking every row to
    # 1e±300 (the behaviour with settling disabled), to the limit tolerance.
    s = sequential_sites([0.5, 20.0])
    s.add_observable("bound", {"P1": 1.0, "P2": 2.0})
    m = compile_scheme(s)
    rng = np.random.default_rng(4)
    base = np.array([[10 ** rng.uniform(-1, 1) for _ in m.symbols] for _ in range(40)])
    kw = dict(observable="bound", input="c", lo=1e-3, hi=1e3, points=31)
    settled = response_summaries(m, base, **kw)
    monkeypatch.setattr(response_domain.Axis, "settle_from", 10 ** 6)
    full = response_summaries(m, base, **kw)
    assert (full["limit_upper_at"] > settled["limit_upper_at"]).all()   # the walk did stop early
    for key in ("ec10", "ec50", "ec90", "hill_effective", "max_slope", "limit_upper", "limit_lower"):
        np.testing.assert_allclose(settled[key], full[key], rtol=1e-10, atol=1e-12, err_msg=key)
    for key in ("monotone", "saturated", "limit_upper_ok", "limit_lower_ok", "direction"):
        assert np.array_equal(settled[key], full[key]), key
