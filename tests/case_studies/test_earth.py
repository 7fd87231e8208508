"""The Earth case study (case_studies/earth): headline numbers against published values.

Every check value names its source; "from memory" marks values recalled rather than read.
Tolerances are ours and are stated beside each check with the reason for their size;
the measured values are in case_studies/earth/README.md.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import replace
from pathlib import Path

import pytest

import components
from inversion.case import load_case, read_target
from inversion.fit import fit_problem
from inversion.model import compile_problem

HERE = Path(__file__).resolve().parents[2] / "case_studies" / "earth"

#: Earth's core mass fraction: core 1.94e24 kg of 5.972e24 kg (e.g. Stacey & Davis 2008,
#: Physics of the Earth, 4th ed.; from memory).
EARTH_CMF = 0.325
#: Late accretion: about 0.5 % of the Earth's mass of chondritic material (Walker 2009,
#: Chem. Erde 69, 101; from memory).
WALKER_LATE_FRACTION = 0.005
#: Wang, Lineweaver & Ireland (2019, Icarus 328, 287): log10 f = a log10 Tc + b for the
#: bulk Earth relative to the Sun (values as given in docs/model.md).
WANG_A, WANG_B = 3.676, -11.556


@pytest.fixture(scope="module")
def ci_fits() -> dict[str, object]:
    """CI-only fits: McDonough & Sun (1995) with power and kinked forms, Palme & O'Neill
    (2014) with the kinked form."""
    case = load_case(HERE / "case_volatility.toml")
    out = {"power": fit_problem(compile_problem(case)),
           "kinked": fit_problem(compile_problem(replace(case, volatility_form="kinked"))),
           "po14": fit_problem(compile_problem(load_case(HERE / "case_palme2014.toml")))}
    for f in out.values():
        assert f.status == "optimal"
    return out


def test_target_agrees_with_the_library_copy():
    """Two typed copies of McDonough & Sun (1995) Table 5 (this case study's and the
    library's) agree to 0.5 % on every element they share."""
    mine, _unc, _ = read_target(HERE / "bse_mcdonough1995.csv", default_uncertainty_pct=15)
    lib = components.load("BSE_MS95").composition
    shared = mine.index.intersection(lib.index)
    assert len(shared) >= 70
    bad = {e: (mine[e], lib[e]) for e in shared if abs(mine[e] / lib[e] - 1) > 0.005}
    assert not bad


def test_volatility_pivot_and_depletion_against_wang_2019(ci_fits):
    f = ci_fits["power"]
    a, b = f.volatility["a"], f.volatility["b"]
    pivot = 10 ** (-b / a)
    wang_pivot = 10 ** (-WANG_B / WANG_A)  # 1392 K
    # the temperature where depletion starts agrees within 0.05 dex (12 %); the published
    # a, b errors alone (taken as uncorrelated) allow 0.17 dex
    assert abs(math.log10(pivot / wang_pivot)) < 0.05
    # depletion at Tc = 1000 K within a factor 2 (0.3 dex) of the published law; the
    # remaining difference is discussed in README.md (BSE/CI vs bulk Earth/Sun)
    ours = min(0.0, a * 3.0 + b)
    theirs = min(0.0, WANG_A * 3.0 + WANG_B)
    assert ours < 0 and abs(ours - theirs) < 0.3


def test_core_mass_fraction_and_late_accretion(ci_fits):
    for key in ("kinked", "power", "po14"):
        f = ci_fits[key]
        # CMF within 0.03 of the Earth's: a 10 % change of the mantle FeO moves it by
        # ~0.006 and the core's light-element budget (not fitted here) by ~0.02-0.03
        assert abs(f.core_mass_fraction - EARTH_CMF) < 0.03, key
        # late accretion within a factor 2 of Walker (2009): ~0.5 % of the Earth's mass
        planet_fraction = f.late_accretion_fraction * (1 - f.core_mass_fraction)
        assert WALKER_LATE_FRACTION / 2 < planet_fraction < WALKER_LATE_FRACTION * 2, key


def test_kinked_form_fits_the_bse_better_than_the_power_law(ci_fits):
    # same number of parameters: the lower chi2 is the better description (README.md)
    assert ci_fits["kinked"].chi2 < ci_fits["power"].chi2


@pytest.fixture(scope="module")
def mixtures() -> dict[tuple[str, ...], object]:
    case = load_case(HERE / "case.toml")
    p = compile_problem(case)
    return {s: fit_problem(p.subset(s)) for r in (1, 2)
            for s in itertools.combinations(p.components, r)}


def test_isotopes_exclude_all_single_groups_but_enstatite(mixtures):
    """e54Cr = e50Ti = 0 (Earth, by definition) rule out every single chondrite group of
    the candidates except EH (Warren 2011, EPSL 311, 93: the Earth plots with the
    enstatite chondrites in e50Ti-e54Cr; from memory)."""
    singles = {s[0]: f for s, f in mixtures.items() if len(s) == 1}
    assert singles["EH"].status == "optimal"
    assert all(f.status == "infeasible" for k, f in singles.items() if k != "EH")


#: Kass & Raftery (1995, J. Am. Stat. Assoc. 90, 773): a BIC difference above 6 is
#: "strong" evidence against the worse hypothesis (from memory).
STRONG_DELTA_BIC = 6.0


def test_an_enstatite_rich_earth_is_not_disfavoured(mixtures):
    """An enstatite-dominated Earth (Dauphas 2017, Nature 541, 521: the Earth's accreted
    material was isotopically enstatite-like; from memory) is not strongly disfavoured.
    Whether it ranks first, or CI + L does, changes with a single value of the tables
    (CV's P; README.md), so only this weaker statement is tested."""
    ok = {s: f for s, f in mixtures.items() if f.status == "optimal"}
    best_bic = min(f.bic for f in ok.values())
    eh_rich = [f for s, f in ok.items() if "EH" in s and f.mass_fractions["EH"] >= 0.9
               and f.bic - best_bic < STRONG_DELTA_BIC]
    assert eh_rich
    # enstatite-rich Earths carry more metal than the Earth's core holds: their CMF
    # exceeds 0.325 by more than the 0.03 granted to the CI fit above (README.md)
    for f in eh_rich:
        assert f.core_mass_fraction - EARTH_CMF > 0.03


@pytest.mark.slow
def test_posterior_of_the_ci_earth(tmp_path):
    """A short Bayesian run of the BSE against CI (kinked form): the posterior medians
    repeat the convex fit's headline numbers (same tolerances as above)."""
    from inversion.cli import main

    text = (HERE / "case_volatility.toml").read_text().replace('form = "power"',
                                                               'form = "kinked"')
    text = text.replace('table = "bse_mcdonough1995.csv"',
                        f'table = "{HERE / "bse_mcdonough1995.csv"}"')
    case = tmp_path / "case.toml"
    case.write_text(text)
    code = main(["sample", str(case), "--out", str(tmp_path / "s"), "--draws", "300",
                 "--tune", "300", "--chains", "2", "--seed", "3", "--quiet"])
    assert code in (0, 4)  # a short run may fail the gate; the medians are still read
    import json

    post = json.loads((tmp_path / "s" / "sample.json").read_text())["posterior"]
    assert abs(post["core_mass_fraction"]["median"] - EARTH_CMF) < 0.03
    late = post["late_accretion_planet_fraction"]["median"]
    assert WALKER_LATE_FRACTION / 2 < late < WALKER_LATE_FRACTION * 2
    assert 1250 < post["volatility"]["T0"]["median"] < 1450
