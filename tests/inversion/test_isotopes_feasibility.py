"""Isotope feasibility of one hypothesis (inversion.isotopes): reachable intervals, the
window widened by end-member uncertainties, and the reasons a hypothesis fails.

Constructed isotope systems are checked against exact answers worked out by hand or an
independent computation (random mixtures, Monte Carlo propagation); the Earth case's own
systems against the library values (components/data/isotopes.csv).
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from inversion.case import load_case
from inversion.isotopes import (
    conservative_sigma,
    effective_sigma,
    feasibility_report,
    late_weight_bound,
    reachable_intervals,
    window_halfwidth,
)
from inversion.model import compile_problem

EARTH = Path(__file__).resolve().parents[2] / "case_studies" / "earth" / "case.toml"


@pytest.fixture(scope="module")
def earth():
    return compile_problem(load_case(EARTH))


def system(name, value, sigma, eps, q=(1.0, 1.0), eps_sigma=(0.0, 0.0),
           rel=(0.0, 0.0), eps_late=0.0, q_late=0.0, eps_sigma_late=0.0):
    eps = np.asarray(eps, float)
    return {"name": name, "carrier": "X", "value": value, "sigma": sigma, "eps": eps,
            "q_carrier": np.asarray(q, float), "eps_sigma": np.asarray(eps_sigma, float),
            "q_carrier_rel_sigma": np.asarray(rel, float), "eps_late": eps_late,
            "q_late": q_late, "eps_sigma_late": eps_sigma_late,
            "q_carrier_rel_sigma_late": 0.0, "range": (eps.min(), eps.max())}


@pytest.fixture(scope="module")
def two_blocks(earth):
    """Two blocks, no late component: the isotope systems are set by each test."""
    return replace(earth.subset(("CI", "EH")), late_name=None, late_max_fraction=0.0)


def test_subset_recomputes_the_range_from_its_own_blocks(earth):
    # e54Cr of the library (Trinquier et al. 2007, from memory): EH 0.04, CI 1.56, H -0.38.
    full = {d["name"]: d["range"] for d in earth.isotopes}
    assert full["e54Cr"] == pytest.approx((-0.38, 1.56))
    sub = {d["name"]: d for d in earth.subset(("CI", "EH")).isotopes}
    assert sub["e54Cr"]["range"] == pytest.approx((0.04, 1.56))
    assert sub["e54Cr"]["eps_sigma"] == pytest.approx([0.06, 0.08])
    st = earth.stacked([("CI", "EH"), ("H", "L")], repeat=2)
    lo, hi = {d["name"]: d["range"] for d in st.isotopes}["e54Cr"]
    assert lo == pytest.approx([0.04, 0.04, -0.38, -0.38])
    assert hi == pytest.approx([1.56, 1.56, -0.38, -0.38])
    assert {d["name"]: d for d in st.isotopes}["e54Cr"]["eps_sigma"].shape == (4, 2)


def test_reachable_interval_matches_random_mixtures(earth):
    # independent check: the extremes over many random admissible mixtures (blocks on the
    # simplex, late weight uniform in [0, v_max]) approach the vertex interval from inside
    p = earth.subset(("CI", "H", "EH"))
    v_max = late_weight_bound(p)
    assert 0 < v_max < 0.2
    rng = np.random.default_rng(7)
    w = rng.dirichlet(np.full(3, 0.3), size=20000)
    v = rng.uniform(0, v_max, size=(20000, 1))
    # a few rows at the vertices: one block alone, without and with the capped late
    v[:200] = v_max
    v[200:400] = 0.0
    w[:400] = np.eye(3)[rng.integers(0, 3, 400)]
    u = np.hstack([(1 - v) * w, v])
    got = reachable_intervals(p)
    for iso in p.isotopes:
        q = np.append(iso["q_carrier"], iso["q_late"])
        e = np.append(iso["eps"], iso["eps_late"])
        vals = (u * q) @ e / (u @ q)
        lo, hi = got[iso["name"]]
        assert lo <= vals.min() + 1e-12 and vals.max() <= hi + 1e-12
        assert vals.min() == pytest.approx(lo, abs=1e-9)
        assert vals.max() == pytest.approx(hi, abs=1e-9)


def test_late_bound_uses_the_real_cap(earth):
    # v_max = lam c_late_R / ((1 - lam) c_R + lam c_late_R) (the formula of fit._design);
    # with the silicate mass per unit R given, the bound is that formula exactly.
    p = earth.subset(("EH",))
    lam, cL = p.late_max_fraction, p.c_late_R
    assert late_weight_bound(p, M_s=4.5) == pytest.approx(lam * cL / ((1 - lam) / 4.5
                                                                       + lam * cL))
    # the default bound takes the largest silicate mass, hence the largest cap
    assert late_weight_bound(p) >= late_weight_bound(p, M_s=4.0)


def test_one_system_out_of_reach_is_named_alone(two_blocks):
    p = replace(two_blocks, isotopes=(
        system("eA", 0.0, 0.05, (1.0, 2.0)),
        system("eB", 0.0, 0.05, (-1.0, 1.0))))
    rep = feasibility_report(p)
    assert not rep.feasible
    assert rep.alone == ("eA",)
    assert rep.joint == ()
    assert rep.intervals["eA"] == pytest.approx((1.0, 2.0))
    assert rep.lines() == ["eA: observed 0 +- 0.1 (2 sigma window with end-member "
                           "errors); CI+EH reaches [1.00, 2.00]"]
    assert feasibility_report(p, window="observed").lines() == [
        "eA: observed 0 +- 0.1 (2 sigma window); CI+EH reaches [1.00, 2.00]"]
    with pytest.raises(ValueError, match="one of"):
        feasibility_report(p, window="wide")
    with pytest.raises(ValueError, match="exactly when"):
        feasibility_report(p, window="at_weights")
    rep = feasibility_report(p, window="at_weights", u=np.array([0.5, 0.5]))
    assert rep.alone == ("eA",)


def test_systems_failing_only_together_are_named_joint(two_blocks):
    # eA needs u_EH = 0.75 and eB needs u_EH = 0.25 (q = 1): each alone is met, together
    # they are not. eC (met by every mixture) is not part of the minimal combination.
    p = replace(two_blocks, isotopes=(
        system("eA", 0.5, 0.02, (-1.0, 1.0)),
        system("eB", -0.5, 0.02, (-1.0, 1.0)),
        system("eC", 0.0, 0.02, (-0.01, 0.01))))
    rep = feasibility_report(p)
    assert rep.alone == ()
    assert rep.joint == (("eA", "eB"),)
    assert rep.lines() == ["eA and eB: each can be met alone, but no mixture of CI+EH "
                           "meets them together"]
    # widen the windows until the two overlap: u_EH = 0.5 meets both with w >= 0.5
    wide = replace(p, isotopes=tuple({**d, "sigma": 0.26} for d in p.isotopes))
    assert feasibility_report(wide).feasible


def test_carrier_weighting_moves_the_joint_answer(two_blocks):
    # with q = (1, 3) the mixture u = (0.5, 0.5) gives eps = (-1 + 3) / 4 = 0.5: the same
    # two systems as above with eB's carrier tripled in EH are met together.
    p = replace(two_blocks, isotopes=(
        system("eA", 0.5, 0.02, (-1.0, 1.0), q=(1.0, 3.0)),
        system("eB", 0.5, 0.02, (-1.0, 1.0), q=(3.0, 1.0))))
    rep = feasibility_report(p)
    assert rep.joint == (("eA", "eB"),)
    p2 = replace(p, isotopes=(p.isotopes[0],
                              system("eB", -0.5, 0.02, (-1.0, 1.0), q=(3.0, 1.0))))
    # eA: u_EH q 3 share 0.75 -> u_EH = 0.5; eB: EH share of carrier 0.25 -> u_EH = 0.5
    assert feasibility_report(p2).feasible


def test_extra_inequalities_enter_the_joint_test(two_blocks):
    p = replace(two_blocks, isotopes=(system("eA", 0.5, 0.02, (-1.0, 1.0)),))
    # u_CI >= 0.5 (written -u_CI <= -0.5) is met alone, but eA needs u_CI = 0.25
    rep = feasibility_report(p, extra=(np.array([[-1.0, 0.0]]), np.array([-0.5])))
    assert rep.alone == ()
    assert rep.joint == (("eA", "iron budget"),)
    # an extra set nothing meets (u_CI + u_EH <= 0.5 on the simplex) fails alone
    rep = feasibility_report(p, extra=(np.array([[1.0, 1.0]]), np.array([0.5])))
    assert rep.alone == ("iron budget",)
    assert rep.lines()[0].startswith("iron budget: no mixture of CI+EH meets it")


def test_window_widening_worked_example():
    # Worked example of the docstring of effective_sigma: q = (1, 3), u = (0.5, 0.5) ->
    # phi = (0.25, 0.75); eps = (2.0, -0.4) -> eps_mix = 0.2; s = (0.2, 0.08),
    # r = (0.1, 0), sigma_obs = 0.05:
    # sigma_eff^2 = 0.0025 + 0.0625 (0.04 + 0.01 * 1.8^2) + 0.5625 * 0.0064 = 0.010625.
    iso = system("eA", 0.0, 0.05, (2.0, -0.4), q=(1.0, 3.0), eps_sigma=(0.2, 0.08),
                 rel=(0.1, 0.0))
    u = np.array([0.5, 0.5])
    assert effective_sigma(iso, u) == pytest.approx(np.sqrt(0.010625), rel=1e-12)
    assert window_halfwidth(iso, u, n_sigma=2.0) == pytest.approx(2 * 0.1030776, rel=1e-6)
    # without end-member uncertainties the window is the observation's own
    bare = system("eA", 0.0, 0.05, (2.0, -0.4), q=(1.0, 3.0))
    assert window_halfwidth(bare, u) == pytest.approx(0.1)
    # simulate then recover: Monte Carlo spread of eps_mix under the stated errors
    rng = np.random.default_rng(3)
    n = 200_000
    eps = np.array([2.0, -0.4]) + rng.normal(size=(n, 2)) * np.array([0.2, 0.08])
    q = np.array([1.0, 3.0]) * (1 + rng.normal(size=(n, 2)) * np.array([0.1, 0.0]))
    mix = (u * q * eps).sum(axis=1) / (u * q).sum(axis=1)
    assert np.sqrt(0.05 ** 2 + mix.var()) == pytest.approx(np.sqrt(0.010625), rel=0.02)


def test_late_column_in_the_window():
    # a third weight is the late component: phi_late = v q_late / sum u q
    iso = system("eA", 0.0, 0.05, (2.0, -0.4), q=(1.0, 3.0), eps_sigma=(0.2, 0.08),
                 eps_late=1.0, q_late=2.0, eps_sigma_late=0.3)
    u = np.array([0.4, 0.4, 0.2])
    uq = u * np.array([1.0, 3.0, 2.0])
    phi = uq / uq.sum()
    expect = np.sqrt(0.05 ** 2 + np.sum(phi ** 2 * np.array([0.2, 0.08, 0.3]) ** 2))
    assert effective_sigma(iso, u) == pytest.approx(expect)
    with pytest.raises(ValueError, match="expected 2"):
        effective_sigma(iso, np.ones(4) / 4)


def test_conservative_window_bounds_every_mixture(two_blocks):
    iso = system("eA", 0.0, 0.05, (2.0, -0.4), q=(1.0, 3.0), eps_sigma=(0.2, 0.08),
                 rel=(0.1, 0.05))
    p = replace(two_blocks, isotopes=(iso,))
    bound = conservative_sigma(p, iso)
    rng = np.random.default_rng(11)
    for u in rng.dirichlet([0.5, 0.5], size=500):
        assert effective_sigma(iso, u) <= bound + 1e-12


def test_earth_single_groups_fail_for_each_system_alone(earth):
    # Library values (components/data/isotopes.csv; Trinquier et al. 2007, 2009, Zhang et
    # al. 2012, from memory): H and CI lie outside the Earth's e54Cr and e50Ti windows on
    # their own, even with the late CI component at its cap; EH meets both. Each failure
    # is named for its own system, none as a joint failure.
    for names in (("H",), ("CI",), ("CV",)):
        rep = feasibility_report(earth.subset(names))
        assert set(rep.alone) == {"e54Cr", "e50Ti"}, names
        assert rep.joint == ()
    assert feasibility_report(earth.subset(("EH",))).feasible
    assert feasibility_report(earth.subset(("CI", "H"))).feasible


def test_earth_readme_delta17o_of_the_mixtures():
    # case_studies/earth/README.md: O-weighted Delta17O of CI 0.305 + H 0.695 and of
    # CM 0.065 + EH 0.935 (mass fractions), from the library's Delta17O (CI 0.39, H 0.73,
    # CM -2.9, EH 0.00 permil; recalled) and O contents (CI 45.82, H 35.7, CM 43.2,
    # EH 28.0 wt%). By hand: (0.305*45.82*0.39 + 0.695*35.7*0.73) / (0.305*45.82 +
    # 0.695*35.7) = 0.607; (0.065*43.2*-2.9) / (0.065*43.2 + 0.935*28.0) = -0.281.
    import components

    iso = components.isotopes()
    d17 = {r.body: r.value for r in iso[iso["quantity"] == "D17O"].itertuples()}

    def mix(fr):
        o = {g: float(components.load(g).composition["O"]) for g in fr}
        return (sum(x * o[g] * d17[g] for g, x in fr.items())
                / sum(x * o[g] for g, x in fr.items()))

    assert mix({"CI": 0.305, "H": 0.695}) == pytest.approx(0.607, abs=0.005)
    assert mix({"CM": 0.065, "EH": 0.935}) == pytest.approx(-0.281, abs=0.005)
    assert abs(mix({"CI": 0.047, "EH": 0.953})) < 0.05


def test_isotope_figure_marks_the_failing_intervals(earth):
    from matplotlib.colors import to_hex

    from inversion.plots import OKABE_ITO, isotope_plot

    hyps = [("CI", "H"), ("H",)]
    ranges = {"+".join(h): reachable_intervals(earth.subset(h)) for h in hyps}
    obs = {d["name"]: (d["value"], 2 * d["sigma"]) for d in earth.isotopes}
    fig = isotope_plot(obs, ranges, predicted={"CI+H": {"e54Cr": 0.1}})
    axes = [a for a in fig.axes if a.get_visible()]
    assert [a.get_title(loc="left") for a in axes] == ["e54Cr", "e50Ti"]
    colours = [to_hex(line.get_color()) for line in axes[0].lines
               if line.get_linewidth() == 3.5]
    # CI+H reaches the window (green), H alone does not (vermillion)
    assert colours == [OKABE_ITO["green"].lower(), OKABE_ITO["vermillion"].lower()]


def test_bayesian_isotope_sigma_is_the_window_formula(earth):
    # The sampler's isotope likelihood scale (deterministic eps_sigma of build_model) is
    # effective_sigma at the draw's weights: the late weight v is recovered from the
    # draw's e54Cr prediction (root of the mass balance), then both systems' sigma_eff are
    # recomputed with the numpy formula.
    import pymc as pm
    from scipy.optimize import brentq

    from inversion.bayes import build_model

    p = earth.subset(("CI", "EH"))
    with build_model(p):
        prior = pm.sample_prior_predictive(draws=6, var_names=["eps_pred", "eps_sigma", "w"],
                                           random_seed=1).prior
    iso = p.isotopes[0]
    qq = np.append(iso["q_carrier"], iso["q_late"])
    ee = np.append(iso["eps"], iso["eps_late"])
    n = 0
    for e, s, w in zip(prior["eps_pred"].values[0], prior["eps_sigma"].values[0],
                       prior["w"].values[0], strict=True):
        def u(v, w=w):
            return np.append((1 - v) * w, v)
        v = brentq(lambda v, e=e, u=u: (u(v) * qq) @ ee / (u(v) @ qq) - e[0], 0.0, 0.999)
        assert s == pytest.approx([effective_sigma(d, u(v)) for d in p.isotopes], rel=1e-6)
        assert np.all(s > [d["sigma"] for d in p.isotopes])
        n += 1
    assert n == 6


def test_conservative_window_bounds_mixtures_with_the_late_column(earth):
    # three columns (two blocks and the late CI at most v_max): the bound uses c = 1/4
    p = earth.subset(("CV", "L"))
    v_max = late_weight_bound(p)
    rng = np.random.default_rng(5)
    for iso in p.isotopes:
        bound = conservative_sigma(p, iso)
        for _ in range(300):
            w = rng.dirichlet([0.5, 0.5])
            v = rng.uniform(0, v_max)
            assert effective_sigma(iso, np.append((1 - v) * w, v)) <= bound + 1e-12


def test_earth_cv_plus_l_fails_jointly_only_without_end_member_errors(earth):
    # Library values: CV + L reaches e54Cr 0 and e50Ti 0 each (CV e54Cr 0.86, e50Ti 3.5;
    # L -0.38, -0.65; Trinquier et al. 2007, 2009, Zhang et al. 2012, from memory), but
    # not at the same mixture within the observed +-0.1 windows; with the end-members'
    # own errors (and ~10 % carrier-concentration errors) the windows overlap.
    p = earth.subset(("CV", "L"))
    strict = feasibility_report(p, window="observed")
    assert strict.alone == ()
    assert strict.joint == (("e54Cr", "e50Ti"),)
    assert feasibility_report(p).feasible
