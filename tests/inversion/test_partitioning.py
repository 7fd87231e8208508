"""Metal/silicate partitioning at (P, T, dIW) and the core split (inversion/partitioning.py).

Reference values are named beside each check: values read in a publication or a typed copy
of it, published statements read in abstracts, or "from memory" where recalled.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy.optimize import brentq, minimize_scalar

import components
from inversion import partitioning as pt
from inversion.exceptions import InputError

EARTH_ELEMENTS = ["Mg", "Si", "Fe", "Ni", "Co", "Al", "Ca", "Ti", "Cr", "V", "Mn", "Na", "S",
                  "W", "Nb"]


def _chondritic_bulk(els: list[str], volatile_from: dict[str, float]) -> np.ndarray:
    """Bulk masses per unit Mg: CI chondrite ratios (Lodders 2003) for every element but
    those given (moderately volatile elements, set to the planet's own ratio)."""
    ci = components.load("CI").composition
    a = np.array([ci[e] / ci["Mg"] for e in els])
    for e, v in volatile_from.items():
        a[els.index(e)] = v
    return a


@pytest.fixture(scope="module")
def earth():
    bse = components.load("BSE_MS95").composition
    # Na and Mn from the McDonough & Sun (1995) mantle (volatile-depleted, lithophile
    # enough to stay there); S from the bulk Earth of McDonough (2003): 0.635 wt% S,
    # 15.4 wt% Mg (from memory)
    a = _chondritic_bulk(EARTH_ELEMENTS, {"Na": bse["Na"] / bse["Mg"],
                                          "Mn": bse["Mn"] / bse["Mg"],
                                          "S": 0.00635 / 0.154})
    return a, pt.compile_chemistry(EARTH_ELEMENTS)


def _solve(a, chem, P, dIW, T=None):
    T = pt.peridotite_liquidus(P) if T is None else T
    return pt.solve_single_stage(a, P, T, dIW, chem)


def _dIW_for_FeO(a, chem, P, feo, T=None):
    """dIW at which the mantle holds the given FeO mass fraction."""
    return brentq(lambda d: float(_solve(a, chem, P, d, T)["mantle_FeO_wt"]) - feo,
                  -4.0, -0.5, xtol=1e-7)


# ------------------------------------------------------------------- the regressions

def _logD(source: str, el: str, P: float, T: float, dIW: float) -> float:
    chem = pt.compile_chemistry(["Fe", el], choice={el: source})
    x = np.zeros(2)
    return float(pt.log10_D_molar(chem, np.array(P), np.array(T), np.array(dIW), x)[1])


# (source, element, a, b, c, n) as read in the typed copies named in
# components/data/sources/partitioning.csv; worked by hand below at 40 GPa, 3000 K,
# dIW = -2: no worked value of the publications could be read, so each check is the
# published equation evaluated by hand from the read coefficients.
READ_COEFFICIENTS = [
    ("fischer2015", "Ni", 0.46, 2700.0, -61.0, 2),
    ("fischer2015", "Co", 0.36, 1500.0, -33.0, 2),
    ("fischer2015", "V", -0.3, -5400.0, 0.0, 3),
    ("fischer2015", "Cr", 0.0, -2900.0, 9.0, 2),
    ("fischer2015", "Si", 1.3, -13500.0, 0.0, 4),
    ("siebert2012", "Ni", 1.06, 1553.0, -98.0, 2),
    ("siebert2012", "Co", 0.13, 2057.0, -57.0, 2),
    ("rubie2015", "V", -0.48, -5063.0, 0.0, 3),
    ("rubie2015", "Cr", -0.17, -2730.0, 0.0, 2),
    ("mann2009", "Nb", 2.66, -14032.0, -199.0, 5),
    ("mann2009", "Ta", 0.84, -13806.0, -101.0, 5),
    ("cottrell2009", "W", -0.35, 1209.0, -114.0, 4),
]
# Hand computation: log10 D = a + b/3000 + 40 c/3000 + n/2 (dIW = -2 gives -(n/4) dIW
# = n/2), e.g. Fischer Ni: 0.46 + 0.9 - 0.81333 + 1 = 1.54667.
HAND = {("fischer2015", "Ni"): 1.546667, ("fischer2015", "Co"): 1.42,
        ("fischer2015", "V"): -0.6, ("fischer2015", "Cr"): 0.153333,
        ("fischer2015", "Si"): -1.2, ("siebert2012", "Ni"): 1.271,
        ("siebert2012", "Co"): 1.055667, ("rubie2015", "V"): -0.667667,
        ("rubie2015", "Cr"): -0.08, ("mann2009", "Nb"): -2.170667,
        ("mann2009", "Ta"): -2.608667, ("cottrell2009", "W"): 0.533}


@pytest.mark.parametrize("source,el,a,b,c,n", READ_COEFFICIENTS)
def test_regression_rows_match_the_read_coefficients(source, el, a, b, c, n):
    row = pt.load_regressions().set_index(["element", "source"]).loc[(el, source)]
    assert (row["a"], row["b"], row["c"], row["valence"]) == (a, b, c, n)
    assert _logD(source, el, 40.0, 3000.0, -2.0) == pytest.approx(HAND[(source, el)],
                                                                  abs=1e-5)


def test_published_trends():
    """Signs of the temperature and pressure effects stated in the abstracts (read):
    Corgne et al. (2008, GCA 72, 574): Ni less siderophile with rising T; Cr, Si, Ta, Nb
    more siderophile with rising T; Ni, Nb, Ta less siderophile with rising P.
    Siebert et al. (2012, EPSL 321, 189): D(Ni), D(Co) fall with rising P.
    Cottrell et al. (2009, EPSL 281, 275): D(W) falls slightly with rising T and falls
    with P above ~3-4 GPa. Evaluated at 5 GPa, inside the range of those experiments
    (at fixed P the T effect goes with b + c P, so it may change sign at high P)."""
    def slope(src, el, dP=0.0, dT=0.0):
        return _logD(src, el, 5.0 + dP, 2500.0 + dT, -2.0) - _logD(src, el, 5.0, 2500.0, -2.0)

    for src, el in [("fischer2015", "Ni"), ("siebert2012", "Ni")]:
        assert slope(src, el, dT=100) < 0
        assert slope(src, el, dP=5) < 0
    for src in ("fischer2015", "siebert2012"):
        assert slope(src, "Co", dP=5) < 0
    for src, el in [("fischer2015", "Cr"), ("rubie2015", "Cr"), ("fischer2015", "Si"),
                    ("mann2009", "Ta"), ("mann2009", "Nb")]:
        assert slope(src, el, dT=100) > 0
    for el in ("Nb", "Ta"):
        assert slope("mann2009", el, dP=5) < 0
    assert slope("cottrell2009", "W", dT=100) < 0
    assert slope("cottrell2009", "W", dP=5) < 0


def test_redox_term_follows_valence():
    # -(n/4) dIW: one log unit more reduced raises log10 D by n/4 (Ni 2+: 0.5, W 4+: 1.0)
    for src, el, n in [("fischer2015", "Ni", 2), ("cottrell2009", "W", 4),
                       ("mann2009", "Nb", 5)]:
        d = _logD(src, el, 30.0, 3000.0, -3.0) - _logD(src, el, 30.0, 3000.0, -2.0)
        assert d == pytest.approx(n / 4.0, abs=1e-12)


def test_every_row_has_a_source_and_provenance():
    reg = pt.load_regressions()
    known = components.sources().index
    assert set(reg["provenance"]) <= {"publication", "typed_copy", "recalled"}
    for keys in reg["source"]:
        assert all(k in known for k in keys.split(";"))
    covered = set(reg["element"])
    assert {"Ni", "Co", "W", "V", "Cr", "Si", "Nb", "O", "S"} <= covered


# ------------------------------------------------------------------- conversions

def test_molar_and_mass_D_by_hand():
    """Metal Fe 0.9, Ni 0.1 (mole); silicate (single-cation oxides) MgO 0.50, SiO2 0.45,
    NiO 0.05. By hand: Mbar_met = 0.9*55.845 + 0.1*58.6934 = 56.12984 g/mol;
    Mbar_sil = 0.5*40.304 + 0.45*60.083 + 0.05*74.6924 = 50.92282 g/mol. Mass fractions
    of Ni: metal 5.86934/56.12984 = 0.104566, silicate 2.93467/50.92282 = 0.057630;
    D_mass = 1.81444, D_mol = 0.1/0.05 = 2."""
    w = components.atomic_weight
    Mbar_met = 0.9 * w("Fe") + 0.1 * w("Ni")
    Mbar_sil = (0.5 * (w("Mg") + w("O")) + 0.45 * (w("Si") + 2 * w("O"))
                + 0.05 * (w("Ni") + w("O")))
    assert Mbar_met == pytest.approx(56.12984, abs=2e-3)
    assert Mbar_sil == pytest.approx(50.92282, abs=2e-3)
    c_met = 0.1 * w("Ni") / Mbar_met
    c_sil = 0.05 * w("Ni") / Mbar_sil
    assert c_met / c_sil == pytest.approx(1.81444, rel=1e-4)
    assert float(pt.molar_to_mass(2.0, Mbar_sil, Mbar_met)) == pytest.approx(c_met / c_sil,
                                                                            rel=1e-12)
    assert float(pt.mass_to_molar(c_met / c_sil, Mbar_sil, Mbar_met)) == pytest.approx(2.0)


def test_liquidus_and_cmb_scaling():
    # Fiquet et al. (2010): 1940 K at zero pressure, 1940 * 2^(1/1.9) = 2794.1 K at 29 GPa
    # (worked by hand from the recalled fit)
    assert float(pt.peridotite_liquidus(0.0)) == pytest.approx(1940.0)
    assert float(pt.peridotite_liquidus(29.0)) == pytest.approx(2794.08, abs=0.05)
    # constant-density scaling: 1/8 of the mass has 1/4 of the pressure
    assert float(pt.cmb_pressure(0.125, 136.0)) == pytest.approx(34.0)


def test_interaction_model_is_gibbs_duhem_consistent_to_first_order():
    chem = pt.compile_chemistry(["Fe", "Si", "S", "Ni"])
    eps = np.array([[12.4, 5.0], [5.0, -5.7]])  # an invented symmetric table
    chem = pt.CoreChemistry(**{**chem.__dict__, "eps_light": eps,
                               "eps": np.array([[0.0, 0.0], eps[0], eps[1], [1.0, -2.0]])})
    T = np.array(1873.0)

    def residual(x0):
        x = np.array([x0, 0.5 * x0])
        dx = 1e-7 * np.array([1.0, 0.3])
        lg1, lfe1 = pt.ln_gamma(x + dx, T, chem)
        lg0, lfe0 = pt.ln_gamma(x - dx, T, chem)
        solute = x[0] * (lg1[1] - lg0[1]) + x[1] * (lg1[2] - lg0[2])
        solvent = (1 - x.sum()) * (lfe1 - lfe0)
        return abs(solute + solvent) / abs(solute)

    # the Gibbs-Duhem defect of the first-order model is of the order of the solute
    # fraction: it vanishes in the dilute limit (a sign error in ln gamma_Fe gives ~2)
    assert residual(1e-3) < 3e-3
    assert residual(1e-4) < 3e-4


# ------------------------------------------------------------------- the core split

def test_split_conserves_mass_and_is_a_fixed_point(earth):
    a, chem = earth
    out = _solve(a, chem, 50.0, -2.2)
    assert bool(out["converged"])
    np.testing.assert_allclose(out["mantle"] + out["core"], a, rtol=1e-12)
    s = out["state"]
    g = pt.split_step(s, a, np.array(50.0), pt.peridotite_liquidus(50.0), np.array(-2.2),
                      chem)
    np.testing.assert_allclose(g, s, rtol=1e-11)
    assert out["core_wt"].sum() + out["core_O_wt"] == pytest.approx(1.0, rel=1e-12)
    # the redox split of iron: x_FeO / x_Fe = 10^(dIW/2) on the single-cation basis
    m, c = out["mantle"], out["core"]
    aw = chem.atomic_weight
    x_feo = (m[2] / aw[2]) / (m / aw).sum()
    x_fe = (c[2] / aw[2]) / ((c / aw).sum() + out["core_O"] / pt.M_O)
    assert 2 * np.log10(x_feo / x_fe) == pytest.approx(-2.2, abs=1e-9)


def test_fixed_feo_split_finds_the_dIW_of_a_root_search(earth):
    """solve_for_mantle_FeO (dIW an unknown of the fixed point) against an independent
    root search of dIW with the fixed-dIW solver."""
    a, chem = earth
    for P in (20.0, 54.0):
        o = pt.solve_for_mantle_FeO(a, P, pt.peridotite_liquidus(P), 0.0805, chem)
        assert bool(o["converged"])
        assert float(o["mantle_FeO_wt"]) == pytest.approx(0.0805, rel=1e-9)
        assert float(o["dIW"]) == pytest.approx(_dIW_for_FeO(a, chem, P, 0.0805), abs=1e-6)


def test_earth_single_stage_fit_of_ni_and_co(earth):
    """Single-stage fit of Ni and Co of the McDonough & Sun (1995) mantle (Ni 1960, Co 105
    ug/g, +-10% 1-sigma, from memory) from a chondritic bulk, at the peridotite liquidus
    (Fiquet et al. 2010) and the dIW that leaves the mantle's 8.05 wt% FeO (McDonough &
    Sun 1995): the best pressure lies in the range of published single-stage solutions,
    from ~28 GPa (Li & Agee 1996, Nature 381, 686; from memory) to ~50-60 GPa (Siebert
    et al. 2012: Ni and Co reach the mantle's values at ~50 GPa, too low above 60 GPa;
    abstract read), dIW near -2, and Ni and Co are reproduced within 1-sigma."""
    a, chem = earth
    obs = {3: 1960e-6, 4: 105e-6}
    sig = np.log10(1.1)
    cache = {}

    def state(P):
        if P not in cache:
            o = pt.solve_for_mantle_FeO(a, P, pt.peridotite_liquidus(P), 0.0805, chem)
            cache[P] = (float(o["dIW"]), o)
        return cache[P]

    def chi2(P):
        _, o = state(P)
        return sum((np.log10(o["mantle"][i] / o["M_s"] / v) / sig) ** 2
                   for i, v in obs.items())

    best = minimize_scalar(chi2, bounds=(15.0, 90.0), method="bounded",
                           options={"xatol": 0.1})
    P = float(best.x)
    d, o = state(P)
    assert 25.0 <= P <= 65.0
    assert -2.6 <= d <= -1.6
    for i, v in obs.items():
        assert abs(np.log10(o["mantle"][i] / o["M_s"] / v)) < sig
    # the core that comes with it: CMF near the Earth's 0.325 (common practice) and S
    # near the 1.9 wt% of McDonough (2003, from memory)
    assert 0.25 <= float(o["cmf"]) <= 0.36
    assert 0.015 <= float(o["core_wt"][EARTH_ELEMENTS.index("S")]) <= 0.025


@pytest.fixture(scope="module")
def mars():
    # Mars bulk: CI ratios (Lodders 2003) for refractory and main-component elements;
    # Mn and Na from the mantle of Wanke & Dreibus (1988); S at 0.4 x CI, the share of
    # the volatile-rich component in their two-component Mars (from memory)
    els = ["Mg", "Si", "Fe", "Ni", "Co", "Al", "Ca", "Ti", "Cr", "V", "Mn", "Na", "S"]
    f = components.oxide_to_element_factor
    mg = 0.302 * f("Mg", 1, 1)
    ci = components.load("CI").composition
    a = _chondritic_bulk(els, {"Mn": 0.0046 * f("Mn", 1, 1) / mg,
                               "Na": 0.0050 * f("Na", 2, 1) / mg,
                               "S": 0.4 * ci["S"] / ci["Mg"]})
    return els, a, pt.compile_chemistry(els)


def test_mars_core_is_sulfur_rich_and_its_mass_seismic(mars):
    """Mars at 14 GPa on the liquidus, dIW set by the 17.9 wt% FeO mantle of Wanke &
    Dreibus (1988): the core holds 10-17 wt% S (Lodders & Fegley 1997 10.6 wt%; Wanke &
    Dreibus 1988 14.2 wt%; both from memory) and the CMF lies within 0.20-0.27 (seismic
    core radius 1830 +- 40 km, Stahler et al. 2021, Science 373, 443; CMF range from
    memory)."""
    els, a, chem = mars
    o = pt.solve_for_mantle_FeO(a, 14.0, pt.peridotite_liquidus(14.0), 0.179, chem)
    assert 0.10 <= float(o["core_wt"][els.index("S")]) <= 0.17
    assert 0.20 <= float(o["cmf"]) <= 0.27


MARS_CASE = (Path(__file__).resolve().parents[2] / "case_studies" / "mars"
             / "case_core.toml")
#: Published single-stage Mars: 14 +- 3 GPa (Yang et al. 2015, Meteoritics & Planet. Sci.,
#: doi:10.1111/maps.12384, abstract read at http://karmaka.de/?p=2970: "core formation at
#: intermediate pressures (14 +- 3 GPa) in a magma ocean on Mars"; also Righter & Chabot
#: 2011, MAPS 46, 157 and Rai & van Westrenen 2013, JGR Planets 118, 1195, from memory);
#: the 10-20 GPa used here contains it.
MARS_PRESSURE_GPA = (10.0, 20.0)


def _mars_ni_co_pressures(mars, chem):
    """Pressures on the liquidus at which the split leaves the Wanke & Dreibus (1988)
    mantle's Ni and Co (400 and 68 ppm, from memory), dIW set by its 17.9 wt% FeO."""
    els, a, _ = mars

    def offset(P, el, obs):
        o = pt.solve_for_mantle_FeO(a, P, pt.peridotite_liquidus(P), 0.179, chem)
        return np.log10(o["mantle"][els.index(el)] / o["M_s"] / obs)

    return {el: brentq(offset, 1.0, 40.0, args=(el, obs), xtol=0.05)
            for el, obs in (("Ni", 400e-6), ("Co", 68e-6))}


def test_mars_equilibration_pressure_ideal(mars):
    """Documents the ideal evaluation (mole fractions for the activity fits of Fischer et
    al. 2015): Ni and Co of the Wanke & Dreibus mantle are matched at 6.8 and 7.3 GPa on
    the Fiquet liquidus (or at 10-12 GPa some 270-430 K below it, docs/partitioning.md),
    both below the published range; this is why the Mars case evaluates them with
    activities (next test)."""
    els, _, chem = mars
    P = _mars_ni_co_pressures(mars, chem)
    assert P["Ni"] == pytest.approx(6.8, abs=0.2) and P["Co"] == pytest.approx(7.3, abs=0.2)
    assert max(P.values()) < MARS_PRESSURE_GPA[0]


def test_mars_equilibration_pressure_siebert2012(mars):
    """The other Ni and Co rows of the table, Siebert et al. (2012, EPSL 321, 189; read in
    the typed copy of Rubie et al. 2015, Table S1), fitted with mole fractions and so
    evaluated ideal as fitted: Ni and Co of the Wanke & Dreibus mantle land at 5.9 GPa
    each on the liquidus, below the published range as well (docs/partitioning.md).
    5.9 is this code's value measured 2026-12-03 (a guard on the evaluation, not a
    published number); the published range is MARS_PRESSURE_GPA's."""
    els, _, _ = mars
    chem = pt.compile_chemistry(els, choice={"Ni": "siebert2012", "Co": "siebert2012"})
    P = _mars_ni_co_pressures(mars, chem)
    assert P["Ni"] == pytest.approx(5.9, abs=0.2) and P["Co"] == pytest.approx(5.9, abs=0.2)
    assert max(P.values()) < MARS_PRESSURE_GPA[0]


def test_mars_equilibration_pressure(mars):
    """With the metal activity model of the Mars case as configured
    (case_studies/mars/case_core.toml: metal_activity = "epsilon", gamma0 of Ni and Co
    and the S and Si interaction parameters of the Steelmaking Data Sourcebook, read in a
    public digitised copy; interaction_parameters.csv) Ni and Co of the Wanke & Dreibus
    (1988) mantle are matched at 11.3 and 16.5 GPa on the liquidus, inside the published
    single-stage Mars range (MARS_PRESSURE_GPA); the core keeps 10-17 wt% S and a CMF of
    0.20-0.27 (as the S-rich bulk test above). Most of the shift from the ideal 6.8 and
    7.3 GPa comes from gamma0 of Ni and Co (with them alone: 10.5 and 17.5 GPa); the S
    terms alone move Ni to 8.1 GPa and leave Co at 7.6 GPa."""
    from inversion.case import load_case

    activity = load_case(MARS_CASE).core.metal_activity
    els, a, _ = mars
    chem = pt.compile_chemistry(els, activity=activity)
    P = _mars_ni_co_pressures(mars, chem)
    for el, v in P.items():
        assert MARS_PRESSURE_GPA[0] <= v <= MARS_PRESSURE_GPA[1], (el, v)
    o = pt.solve_for_mantle_FeO(a, 14.0, pt.peridotite_liquidus(14.0), 0.179, chem)
    assert 0.10 <= float(o["core_wt"][els.index("S")]) <= 0.17
    assert 0.20 <= float(o["cmf"]) <= 0.27


@pytest.fixture(scope="module")
def mars_case_fit():
    """planetmix fit of case_studies/mars/case_core.toml (pressure inferred over [3, 30]
    GPa on the liquidus, the case's metal activity model): result, problem, core wt%."""
    from inversion.case import load_case
    from inversion.conditions import infer_conditions, start_problem
    from inversion.fit import FitSettings, forward_of

    case = load_case(MARS_CASE)
    res, pc = infer_conditions(start_problem(case), case, FitSettings(cmf_range=case.cmf_range))
    fwd = forward_of(pc, res)
    core = dict(zip(pc.elements, 100.0 * fwd["core"][0] / fwd["M_c"][0], strict=True))
    return res, pc, core


#: Published core S of Mars [wt%]: ~5-10 (Wang & Becker 2017, EPSL 463, 56, as reported by
#: https://www.trr170-lateaccretion.de/news/trr-170-nasas-insight-mission, read), <= 7
#: (Yoshizaki & McDonough 2020, GCA 273, 137, abstract read), 14.24 (Dreibus & Wanke 1987
#: table, read in ESA SP-1231 p. 86 on yumpu.com; the model of Wanke & Dreibus 1988).
MARS_CORE_S_WT = (5.0, 15.0)
#: Seismic CMF of Mars: 0.21-0.27 from the core radius 1830 +- 40 km and core density
#: 5.7-6.3 g/cm3 of Stahler et al. (2021, Science 373, 443; from memory) and the mass
#: 6.417e23 kg (case_studies/mars/README.md, "Core size").
MARS_SEISMIC_CMF = (0.21, 0.27)


def test_mars_case_core_mass_fraction(mars_case_fit):
    """The Mars case (core formation at the inferred pressure, the Wang & Becker S fitted)
    gives a core mass inside the seismic range: measured 0.213 (at its lower edge)."""
    res, pc, _ = mars_case_fit
    assert res.feasible
    assert MARS_SEISMIC_CMF[0] <= res.core_mass_fraction <= MARS_SEISMIC_CMF[1]
    # with the case's activity model, and a pressure interval that reaches into the
    # published range (measured 9.0 GPa, 95% profile interval [4.0, 13.1])
    c = pc.core_conditions
    assert c["metal_activity"]["model"] == "epsilon"
    assert c["pressure_inferred"]["interval_95"][1] >= 11.0  # 14 - 3 GPa


@pytest.mark.xfail(strict=True, reason="measured: the Mars case's core holds 0.79 wt% S (0.82 "
                   "ideal, 1.47 with the effective D): the volatility trend of Na, K and Mn "
                   "leaves 0.18 wt% S in the bulk, and with the Earth-calibrated D_S = 76 the "
                   "mantle's 360 ppm is two-thirds late veneer (docs/partitioning.md)")
def test_mars_case_core_sulfur(mars_case_fit):
    _, _, core = mars_case_fit
    assert MARS_CORE_S_WT[0] <= core["S"] <= MARS_CORE_S_WT[1], core["S"]


@pytest.mark.xfail(strict=True, reason="measured: the whole pattern puts the Mars case's "
                   "single stage at 9.0 GPa (95% [4.0, 13.1]; ideal 4.5 GPa [<= 3.0, 8.4]), "
                   "just below the published 10-20 GPa that Ni and Co alone reach")
def test_mars_case_pressure_in_the_published_range(mars_case_fit):
    _, pc, _ = mars_case_fit
    P = pc.core_conditions["pressure_GPa"]
    assert MARS_PRESSURE_GPA[0] <= P <= MARS_PRESSURE_GPA[1], P


# ------------------------------------------------------------------- continuous accretion

def test_one_step_accretion_is_the_single_stage_split(earth):
    a, chem = earth
    acc = pt.continuous_accretion(a, chem, n_steps=1, P_cmb_final=136.0, depth_fraction=0.4,
                                  dIW_start=-2.2, inner_steps=400)
    one = _solve(a, chem, 0.4 * 136.0, -2.2)
    np.testing.assert_allclose(acc["mantle"], one["mantle"], rtol=1e-9)
    assert float(acc["cmf"]) == pytest.approx(float(one["cmf"]), rel=1e-9)


def test_accretion_conserves_mass_and_follows_its_path(earth):
    a, chem = earth
    acc = pt.continuous_accretion(a, chem, n_steps=5, P_cmb_final=136.0, depth_fraction=0.5,
                                  dIW_start=-3.0, dIW_end=-2.0, inner_steps=150)
    np.testing.assert_allclose(acc["mantle"] + acc["core"], a, rtol=1e-10)
    assert acc["dIW"][0] == -3.0 and acc["dIW"][-1] == -2.0
    assert float(acc["P"][-1]) == pytest.approx(68.0)
    assert float(acc["T"][0]) == pytest.approx(float(pt.peridotite_liquidus(
        0.5 * 136.0 * 0.2 ** (2 / 3))))
    assert np.all(np.diff(np.array(acc["P"], float)) > 0)


# ------------------------------------------------------------------- numpy and JAX

@pytest.fixture(scope="module")
def jnp():
    # JAX started the project's way (double precision, one CPU device per chain): a
    # JAX started here with its defaults leaves later tests of this process one device,
    # and NumPyro's chains then run one after the other with other draws
    pytest.importorskip("jax")
    from inversion.jaxmodel import jax_setup

    jax_setup()
    import jax.numpy as jnp
    return jnp


def test_numpy_and_jax_give_the_same_numbers(earth, jnp):
    a, chem = earth
    P, T, d = 45.0, 3200.0, -2.1
    s = _solve(a, chem, P, d, T)["state"] * 1.01
    g_np = pt.split_step(s, a, np.array(P), np.array(T), np.array(d), chem)
    g_jx = pt.split_step(jnp.asarray(s), jnp.asarray(a), jnp.asarray(P), jnp.asarray(T),
                         jnp.asarray(d), chem, xp=jnp)
    np.testing.assert_allclose(np.asarray(g_jx), g_np, rtol=1e-10)
    o_np = pt.single_stage_unrolled(a, P, T, d, chem, n_steps=15)
    o_jx = pt.single_stage_unrolled(jnp.asarray(a), P, T, d, chem, n_steps=15, xp=jnp)
    for key in ("mantle", "core", "cmf", "core_O_wt", "D"):
        np.testing.assert_allclose(np.asarray(o_jx[key]), o_np[key], rtol=1e-10)
    acc_np = pt.continuous_accretion(a, chem, n_steps=2, P_cmb_final=136.0, inner_steps=8)
    acc_jx = pt.continuous_accretion(jnp.asarray(a), chem, n_steps=2, P_cmb_final=136.0,
                                     inner_steps=8, xp=jnp)
    np.testing.assert_allclose(np.asarray(acc_jx["mantle"]), acc_np["mantle"], rtol=1e-10)


def test_jax_gradient_matches_central_differences(earth, jnp):
    """The implicit-function gradient built from the one step G (jax.jacfwd of
    split_step at the numpy fixed point, jax.grad of split_outputs) equals central
    differences of the converged numpy solver: the recipe the JAX model wraps."""
    import jax

    a, chem = earth
    theta = np.array([45.0, 3200.0, -2.1])
    s = _solve(a, chem, theta[0], theta[2], theta[1])["state"]

    def G(state, t):
        return pt.split_step(state, jnp.asarray(a), t[0], t[1], t[2], chem, xp=jnp)

    def f(state, t):
        o = pt.split_outputs(state, jnp.asarray(a), t[0], t[1], t[2], chem, xp=jnp)
        return jnp.log10(o["mantle"][3] / o["M_s"])

    sj, tj = jnp.asarray(s), jnp.asarray(theta)
    J_s, J_t = jax.jit(jax.jacfwd(G, argnums=(0, 1)))(sj, tj)
    ds = np.linalg.solve(np.eye(5) - np.asarray(J_s), np.asarray(J_t))
    f_s, f_t = jax.jit(jax.grad(f, argnums=(0, 1)))(sj, tj)
    grad = np.asarray(f_s) @ ds + np.asarray(f_t)
    h = np.array([1e-3, 1e-2, 1e-4])
    fd = []
    for i in range(3):
        e = np.zeros(3)
        e[i] = h[i]
        up = pt.solve_single_stage(a, *(theta + e), chem)
        dn = pt.solve_single_stage(a, *(theta - e), chem)
        fd.append((np.log10(up["mantle"][3] / up["M_s"])
                   - np.log10(dn["mantle"][3] / dn["M_s"])) / (2 * h[i]))
    np.testing.assert_allclose(grad, fd, rtol=1e-6)


@pytest.mark.slow
def test_jax_gradient_through_the_unrolled_iteration(earth, jnp):
    """jax.grad through the fixed-step iteration (started at the fixed point, so the
    steps carry only the derivative) converges to the central differences."""
    import jax

    a, chem = earth
    theta = np.array([45.0, 3200.0, -2.1])
    sj = jnp.asarray(_solve(a, chem, theta[0], theta[2], theta[1])["state"])

    def unrolled(t, xp, state0, steps):
        o = pt.single_stage_unrolled(xp.asarray(a), t[0], t[1], t[2], chem, n_steps=steps,
                                     xp=xp, state0=state0)
        return xp.log10(o["mantle"][3] / o["M_s"])

    grad = np.asarray(jax.grad(lambda t: unrolled(t, jnp, sj, 12))(jnp.asarray(theta)))
    h = np.array([1e-3, 1e-2, 1e-4])
    fd = [(unrolled(theta + h[i] * np.eye(3)[i], np, None, 400)
           - unrolled(theta - h[i] * np.eye(3)[i], np, None, 400)) / (2 * h[i])
          for i in range(3)]
    np.testing.assert_allclose(grad, fd, rtol=1e-3)


# ------------------------------------------------------------------- input errors

def test_bad_choices_are_refused():
    with pytest.raises(InputError, match="no Ni regression from source nobody"):
        pt.compile_chemistry(["Fe", "Ni"], choice={"Ni": "nobody"})
    with pytest.raises(InputError, match="activity model"):
        pt.compile_chemistry(["Fe", "Ni"], activity="perfect")
    with pytest.raises(InputError, match="no Fe"):
        pt.compile_chemistry(["Ni"])


def test_bad_table_rows_are_refused(tmp_path):
    src = (pt.DATA / "metal_silicate_regressions.csv").read_text()
    bad = tmp_path / "bad.csv"
    bad.write_text(src.replace("fischer2015,typed_copy", "fischer2015,guessed", 1))
    with pytest.raises(InputError, match="provenance") as err:
        pt.load_regressions(bad)
    assert err.value.row == 2
    bad.write_text(src.replace(",exchange,", ",linear,", 1))
    with pytest.raises(InputError, match="form must be"):
        pt.load_regressions(bad)


def test_epsilon_activity_term_by_hand():
    """activity="epsilon" adds -log10 gamma_Si + 2 log10 gamma_Fe to Si (a fit of
    activities, Fischer et al. 2015). By hand at 1873 K, x_Si = 0.1: ln gamma_Si = -6.65
    + 12.4 * 0.1 = -5.41 (steelmaking values: gamma0 recalled, eps_Si^Si read in Huang
    et al. 2020 Table 1); ln gamma_Fe = -0.5 * 12.4 * 0.01 = -0.062; the shift is
    (5.41 - 0.124) / ln 10 = 2.29569."""
    args = (np.array(40.0), np.array(1873.0), np.array(-2.0), np.array([0.1, 0.0]))
    ideal = pt.compile_chemistry(["Fe", "Si"])
    eps = pt.compile_chemistry(["Fe", "Si"], activity="epsilon")
    shift = pt.log10_D_molar(eps, *args)[1] - pt.log10_D_molar(ideal, *args)[1]
    assert float(shift) == pytest.approx(2.29569, abs=1e-5)
    # the O fit divides by gamma_Fe: log10 x_O rises by 0.062 / ln 10
    x_i = pt.oxygen_in_metal(ideal, *args)
    x_e = pt.oxygen_in_metal(eps, *args)
    assert float(np.log10(x_e / x_i)) == pytest.approx(0.062 / np.log(10.0), rel=1e-9)


# ------------------------------------------------ the HSE: one D or published values

def _earth_case(tmp_path, core_lines: str):
    """The Earth case (case_studies/earth/case.toml) with extra [core] lines."""
    from pathlib import Path

    from inversion.case import load_case

    here = Path(__file__).resolve().parents[2] / "case_studies" / "earth"
    text = (here / "case.toml").read_text()
    text = text.replace('table = "bse_mcdonough1995.csv"',
                        f'table = "{(here / "bse_mcdonough1995.csv").as_posix()}"')
    text = text.replace("[core]\n", "[core]\n" + core_lines + "\n", 1)
    path = tmp_path / "earth.toml"
    path.write_text(text)
    return load_case(path)


def test_hse_table_is_complete_and_labelled():
    table = pt.load_hse_table()
    for name in pt.hse_sets()[1:]:
        rows = table[table["set"] == name]
        assert sorted(rows["element"]) == sorted(pt.HSE), name
        # every value says where it comes from and whether it was read
        assert set(rows["provenance"]) <= {"publication", "typed_copy", "recalled"}
    assert pt.hse_D("constant") == {}


def test_hse_choice_reaches_the_model_and_the_mantle_by_hand(tmp_path):
    """hse_partitioning changes the D the forward model uses; the mantle Pt before late
    accretion is then bulk / (1 + D k), with k the core/mantle mass ratio (mass balance of
    docs/partitioning.md)."""
    from inversion.model import compile_problem, forward

    pc = compile_problem(_earth_case(tmp_path, 'hse_partitioning = "constant"'))
    ph = compile_problem(_earth_case(tmp_path, 'hse_partitioning = "high-pressure"'))
    published = pt.hse_D("high-pressure")
    for el in pt.HSE:
        if el not in ph.elements:
            continue
        i = ph.elements.index(el)
        # constant: the 1e4 of earth_core_mantle.csv (Walker 2009, recalled)
        assert pc.D[pc.elements.index(el)] == pytest.approx(1e4)
        assert ph.D[i] == pytest.approx(published[el])
    i = ph.elements.index("Pt")
    w = np.full((1, len(ph.components)), 1.0 / len(ph.components))
    vol = np.array([[1350.0, 0.002]])
    mantle = {}
    for name, p in (("constant", pc), ("high-pressure", ph)):
        out = forward(p, w, vol, 0.0)
        k = float(out["k"][0])
        hand = float(out["bulk"][0, i]) / (1.0 + p.D[i] * k)
        assert float(out["mantle"][0, i]) == pytest.approx(hand, rel=1e-9)
        mantle[name] = float(out["mantle"][0, i])
    # D 500 instead of 1e4 leaves ~20x more Pt in the mantle (k ~ 0.5: (1 + 1e4 k) /
    # (1 + 500 k))
    assert mantle["high-pressure"] / mantle["constant"] > 15.0


def test_hse_explicit_D_wins_and_unknown_choice_is_refused(tmp_path):
    case = _earth_case(tmp_path, 'hse_partitioning = "high-pressure"\nD = {Pt = 2e4}')
    assert case.core.D["Pt"] == 2e4 and case.core.D["Pd"] == pytest.approx(800.0)
    with pytest.raises(InputError, match="unknown HSE partitioning") as err:
        _earth_case(tmp_path, 'hse_partitioning = "lowest"')
    assert err.value.field == "core.hse_partitioning" and "\n" not in str(err.value)


# ------------------------------------------------ [core] metal_activity in the case file

def _ln_gamma_by_hand(x_si: float, x_s: float, T: float) -> tuple[float, float]:
    """ln gamma_Ni and ln gamma_Fe of the epsilon model (docs/partitioning.md) from the
    values of interaction_parameters.csv typed here: ln gamma0_Ni = -0.416 (gamma0 0.66),
    eps_Ni^S = -0.049, eps_Ni^Si = 1.19, eps_Si^Si = 12.4, eps_Si^S = 9.14, eps_S^S =
    -5.65 (Steelmaking Data Sourcebook copy and Huang et al. 2020, Table 1)."""
    s = 1873.0 / T
    ln_ni = s * (-0.416 - 0.049 * x_s + 1.19 * x_si)
    quad = 12.4 * x_si ** 2 + 2 * 9.14 * x_si * x_s - 5.65 * x_s ** 2
    return ln_ni, -0.5 * s * quad


@pytest.mark.parametrize("core, match", [
    ('partitioning = "single-stage"\npressure_GPa = 40.0\ndIW = -2.0\n'
     'metal_activity = "perfect"', "ideal"),
    ('dIW = -2.0\nmetal_activity = "epsilon"', "single-stage"),
])
def test_metal_activity_key_is_checked(tmp_path, core, match):
    from inversion.case import load_case
    from tests.inversion.test_core_conditions import _case

    with pytest.raises(InputError, match=match) as err:
        load_case(_case(tmp_path, "[core]\n" + core))
    assert err.value.field == "core.metal_activity" and "\n" not in str(err.value)


def test_metal_activity_reaches_the_convex_and_the_sampler_D(tmp_path):
    """metal_activity = "epsilon" changes the regression D of the compiled problem by the
    activity term of Fischer et al.'s (2015) activity fit, -log10 gamma_Ni + log10
    gamma_Fe for Ni (n = 2), at the metal's Si and S recorded in core_conditions (here
    the reference core of McDonough 2003); W, Nb or Ta (ideal fits) do not move; the
    sampler's D (jaxmodel.pressure_D, numpy and JAX) are the convex path's."""
    from inversion.case import load_case
    from inversion.jaxmodel import jax_setup, pressure_D
    from inversion.model import compile_problem
    from tests.inversion.test_core_conditions import _case

    core = '[core]\npartitioning = "single-stage"\npressure_GPa = 40.0\ndIW = -2.0\n'
    pi = compile_problem(load_case(_case(tmp_path, core)))
    pe = compile_problem(load_case(_case(tmp_path, core + 'metal_activity = "epsilon"')))
    c = pe.core_conditions
    assert c["metal_activity"]["model"] == "epsilon"
    assert pi.core_conditions["metal_activity"]["model"] == "ideal"
    x_si, x_s = c["x_Si_metal"], c["x_S_metal"]
    assert 0.05 < x_si < 0.2 and 0.0 < x_s < 0.05  # the Earth's core: 6 and 1.9 wt%
    ln_ni, ln_fe = _ln_gamma_by_hand(x_si, x_s, c["temperature_K"])
    ni = pe.elements.index("Ni")
    w = next(pe.elements.index(e) for e in ("W", "Nb", "Ta") if e in pe.elements)
    shift = np.log10(pe.D[ni] / pi.D[ni])
    assert shift == pytest.approx((-ln_ni + ln_fe) / np.log(10.0), abs=1e-9)
    assert pe.D[w] == pytest.approx(pi.D[w], rel=1e-12)
    _, D_of_P = pressure_D(pe)
    np.testing.assert_allclose(D_of_P(40.0), pe.D, rtol=1e-12)
    jax_setup()
    import jax.numpy as jnp

    np.testing.assert_allclose(np.asarray(D_of_P(jnp.asarray(40.0), jnp)), pe.D,
                               rtol=1e-12)


def test_fit_json_and_sample_summary_name_the_core_choices(tmp_path):
    """planetmix fit with metal_activity = "epsilon" and hse_partitioning =
    "high-pressure": core_conditions and the provenance name both, with their source
    keys; the epsilon fit iterates the metal's Si and S to those of its own core (fixed
    point to 5e-4 in mole fraction); the sample summary's core_conditions carry the same
    entries (bayes_cli._posterior_conditions with no sampled condition)."""
    import json
    from types import SimpleNamespace

    from inversion.bayes_cli import _posterior_conditions
    from inversion.case import load_case
    from inversion.cli import main
    from inversion.fit import forward_of
    from tests.inversion.test_core_conditions import _simulate

    path, _ = _simulate(tmp_path, 0.01, seed=5)
    text = path.read_text().replace("pressure_GPa = [10.0, 80.0]", "pressure_GPa = 40.0")
    path.write_text(text.replace('[core]\n', '[core]\nmetal_activity = "epsilon"\n'
                                 'hse_partitioning = "high-pressure"\n', 1))
    assert main(["fit", str(path), "--out", str(tmp_path / "out")]) == 0
    fit = json.loads((tmp_path / "out" / "fit.json").read_text())
    c = fit["core_conditions"]
    assert c["metal_activity"]["model"] == "epsilon"
    assert {"steelmaking1988", "huang2020"} <= set(c["metal_activity"]["sources"])
    assert "Ni (fischer2015)" in c["metal_activity"]["applies_to"]
    assert c["hse_partitioning"]["choice"] == "high-pressure"
    assert set(c["hse_partitioning"]["sources"]) == set(
        pt.load_hse_table().query("set == 'high-pressure'")["source"])
    prov = fit["provenance"]["core_partitioning"]
    assert prov["metal_activity"]["model"] == "epsilon"
    assert prov["hse_partitioning"]["D"]["Pt"] == pytest.approx(pt.hse_D("high-pressure")["Pt"])
    # the metal's Si and S at the fixed point of the fit
    from inversion.conditions import fit_at_conditions, start_problem
    from inversion.fit import FitSettings

    case = load_case(path)
    res, pc, st = fit_at_conditions(start_problem(case), case, 40.0,
                                    FitSettings(intervals=False))
    core = np.maximum(forward_of(pc, res)["core"][0], 0.0)
    mol = core / pc.atomic_weight
    for el, x in (("Si", st[2]), ("S", st[3])):
        assert x == pytest.approx(mol[pc.elements.index(el)] / mol.sum(), abs=5e-4)
    summary = _posterior_conditions(pc, SimpleNamespace(posterior={}))
    assert summary["metal_activity"]["model"] == "epsilon"
    assert summary["hse_partitioning"]["choice"] == "high-pressure"


def test_choice_provenance_of_the_defaults():
    """The defaults: the one D = 1e4 of earth_core_mantle.csv (Walker 2009, recalled) and
    the ideal evaluation (no activity sources)."""
    d = pt.choice_provenance()
    assert d["hse_partitioning"]["choice"] == "constant"
    assert set(d["hse_partitioning"]["D"].values()) == {1e4}
    assert d["hse_partitioning"]["sources"] == ["walker2009"]
    assert d["metal_activity"] == {"model": "ideal", "description": d["metal_activity"][
        "description"], "sources": []}
    with pytest.raises(InputError, match="activity model"):
        pt.choice_provenance(metal_activity="perfect")


def test_sampler_holds_the_convex_fits_metal_not_the_reference_core(tmp_path):
    """planetmix sample on a single-stage case starts from the convex fit at the inferred
    conditions (conditions.sampling_start): the metal's Si and S and mean molar masses
    the sampler holds are the fit's own core's (fixed point to 5e-4 in mole fraction),
    not the reference core's (McDonough 2003, x_Si ~ 0.11) that start_problem holds; at
    the fitted pressure the sampler's D (jaxmodel.conditions_D) are the convex fit's
    (1e-12 relative); the pressure range stays the case's and the start pressure is the
    fitted one. Synthetic body of test_core_conditions (simulate, then fit)."""
    from inversion.case import load_case
    from inversion.conditions import _metal, sampling_start, start_problem
    from inversion.fit import forward_of
    from inversion.jaxmodel import condition_ranges, conditions_D
    from tests.inversion.test_core_conditions import _simulate

    path, _ = _simulate(tmp_path, 0.01, seed=5)
    path.write_text(path.read_text().replace('[core]\n', '[core]\nmetal_activity = '
                                             '"epsilon"\n', 1))
    case = load_case(path)
    p0 = start_problem(case)
    ps, res = sampling_start(p0, case)
    assert res is not None and res.feasible
    cc, c0 = ps.core_conditions, p0.core_conditions
    own = _metal(ps, forward_of(ps, res)["core"][0])  # (x_Fe, Mbar_met, x_Si, x_S)
    assert abs(cc["x_Si_metal"] - own[2]) < 5e-4 and abs(cc["x_S_metal"] - own[3]) < 5e-4
    assert abs(cc["x_Si_metal"] - c0["x_Si_metal"]) > 5e-3  # not the reference core
    assert cc["Mbar_met_g_mol"] == pytest.approx(own[1], rel=1e-3)
    assert condition_ranges(ps) == {"pressure_GPa": (10.0, 80.0)}
    mask, D_of = conditions_D(ps)
    np.testing.assert_allclose(D_of(cc["pressure_GPa"]), ps.D, rtol=1e-12)
    assert mask.any() and cc["pressure_GPa"] != pytest.approx(45.0)  # not mid-range
    assert "metal_held_from" in cc and "conditions_inferred" not in cc


# ------------------------------------------ HSE rows read (not recalled) and their values

_READ = {"publication", "typed_copy"}  # the provenance labels of a value read here


def test_hse_rows_read_carry_a_url_and_the_statement_read():
    """Every row of hse_high_pressure.csv whose value was read (provenance publication or
    typed_copy) names the page (url) and the words read (read_statement); Re is such a row
    (Bennett & Brenan 2013, read 2026-12-03), the rest stay recalled."""
    table = pt.load_hse_table()
    read = table[table["provenance"].isin(_READ)]
    assert "Re" in set(read["element"])
    for _, row in read.iterrows():
        assert str(row["url"]).startswith("https://"), row["element"]
        assert len(str(row["read_statement"]).strip()) > 40, row["element"]
    assert set(table["provenance"]) - _READ == {"recalled"}


def test_hse_read_Re_is_the_published_regression_and_reaches_the_model(tmp_path):
    """Re of the high-pressure set: log10 D = 0.50e4 / T + 3.73 at 2 GPa, dIW +1.75 to +2
    (Bennett & Brenan 2013, EPSL 361, 320; the abstract read in the data-set record
    https://b2find.eudat.eu/dataset/91722762-1ef7-56dd-a6f6-6944adbd39da), evaluated at
    the row's 2573 K (the top of the experiments' 1673-2573 K): D = 4.71e5. The D the
    forward model uses for every read row is the csv's."""
    from inversion.model import compile_problem

    table = pt.load_hse_table()
    row = table[(table["set"] == "high-pressure") & (table["element"] == "Re")].iloc[0]
    assert row["source"] == "bennett2013" and row["provenance"] in _READ
    assert float(row["P_GPa"]) == 2.0 and float(row["T_K"]) == 2573.0
    published = 10.0 ** (0.50e4 / 2573.0 + 3.73)  # Bennett & Brenan (2013), read
    assert float(row["D"]) == pytest.approx(published, rel=1e-3)
    assert pt.hse_D("high-pressure")["Re"] == pytest.approx(published, rel=1e-3)
    ph = compile_problem(_earth_case(tmp_path, 'hse_partitioning = "high-pressure"'))
    read = table[(table["set"] == "high-pressure") & table["provenance"].isin(_READ)]
    for el, d in zip(read["element"], read["D"], strict=True):
        assert ph.D[ph.elements.index(el)] == pytest.approx(float(d), rel=1e-12), el
    prov = pt.choice_provenance("high-pressure")["hse_partitioning"]
    assert "bennett2013" in prov["sources"] and "typed_copy" in prov["provenance"]
