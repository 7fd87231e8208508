"""Solar photospheric abundances (components/data/solar/) checked against published values.

Every check value below names its source; "from memory" marks values typed from memory of
the publication.
"""

from __future__ import annotations

import math

import numpy as np
import periodictable
import pytest

import components


@pytest.fixture(scope="module")
def sun():
    return components.solar("asplund2021")


@pytest.fixture(scope="module")
def ci():
    return components.load("CI").composition


def _log_number_ratio_ci(ci, x: str, ref: str) -> float:
    """log10 of the atom ratio x/ref in CI chondrites from mass fractions."""
    n_x = ci[x] / components.atomic_weight(x)
    n_ref = ci[ref] / components.atomic_weight(ref)
    return math.log10(n_x / n_ref)


def test_asplund2021_is_the_default_table():
    assert "asplund2021" in components.solar_tables()
    assert components.solar().equals(components.solar("asplund2021"))


def test_hydrogen_defines_the_scale(sun):
    # A(H) = 12 by definition of the astronomical scale (Asplund et al. 2021, Table 2).
    assert sun.loc["H", "A"] == 12.0


@pytest.mark.parametrize(
    "sym, a, sigma",
    [
        # Asplund, Amarsi & Grevesse (2021, A&A 653, A141) Table 2, present-day photosphere;
        # from memory.
        # Tolerance 0.005 dex on A (the table gives two decimals), 0.005 on sigma.
        ("Fe", 7.46, 0.04),
        ("Mg", 7.55, 0.03),
        ("Si", 7.51, 0.03),
        ("O", 8.69, 0.04),
        ("C", 8.46, 0.04),
        ("N", 7.83, 0.07),
        ("Ni", 6.20, 0.04),
        ("Ca", 6.30, 0.03),
        ("Al", 6.43, 0.03),
        ("Na", 6.22, 0.03),
    ],
)
def test_asplund2021_spot_checks(sun, sym, a, sigma):
    assert sun.loc[sym, "A"] == pytest.approx(a, abs=0.005)
    assert sun.loc[sym, "uncertainty"] == pytest.approx(sigma, abs=0.005)


def test_helium_from_helioseismology(sun):
    # Asplund et al. (2021): present-day photospheric He from helioseismology,
    # A(He) = 10.914 +- 0.013; from memory. Tolerance 0.002 dex.
    assert sun.loc["He", "A"] == pytest.approx(10.914, abs=0.002)


def test_table_is_well_formed(sun):
    assert sun.index.is_unique
    for sym in sun.index:
        periodictable.elements.symbol(sym)  # raises for an unknown symbol
    sig = sun["uncertainty"].drop("H")
    assert sig.notna().all()
    assert ((sig > 0) & (sig <= 0.3)).all()
    # No element exceeds hydrogen.
    assert (sun["A"] <= 12.0).all()
    assert len(sun) >= 60  # Asplund et al. (2021) give photospheric values for ~68 elements


def test_every_row_has_a_known_source(sun):
    known = set(components.sources().index)
    for sym, key in sun["source"].items():
        assert key in known, (sym, key)


@pytest.mark.parametrize("x", ["Mg", "Fe"])
def test_solar_and_ci_ratios_to_si_agree(sun, ci, x):
    # Published fact: for non-volatile elements the photospheric and CI-chondrite abundances
    # agree (Lodders 2003 sect. 4; Asplund et al. 2021 sect. 5, agreement to ~0.04 dex for
    # most such elements). Mg/Si and Fe/Si number ratios: tolerance 0.05 dex.
    sun_ratio = sun.loc[x, "A"] - sun.loc["Si", "A"]
    ci_ratio = _log_number_ratio_ci(ci, x, "Si")
    assert abs(sun_ratio - ci_ratio) <= 0.05, (x, sun_ratio, ci_ratio)


def test_refractory_and_main_component_ratios_agree_within_errors(sun, ci):
    # Same published fact, for the rock-forming non-volatile elements: agreement within
    # 3 sigma of the photospheric value plus 0.03 dex for the meteoritic side.
    for x in ("Al", "Ca", "Ti", "Cr", "Ni", "Co", "Sc", "Mg", "Fe", "La", "Ce", "Nd"):
        sun_ratio = sun.loc[x, "A"] - sun.loc["Si", "A"]
        ci_ratio = _log_number_ratio_ci(ci, x, "Si")
        tol = 3 * math.hypot(sun.loc[x, "uncertainty"], sun.loc["Si", "uncertainty"]) + 0.03
        assert abs(sun_ratio - ci_ratio) <= tol, (x, sun_ratio - ci_ratio, tol)


def test_lithium_depleted_in_the_photosphere(sun, ci):
    # Published fact: the solar photosphere has lost Li by burning; it lies about 2.3 dex
    # below the meteoritic value (Asplund et al. 2021, Table 2: photosphere 0.96 vs
    # meteorites 3.25 on the Si-matched scale; from memory).
    diff = (sun.loc["Li", "A"] - sun.loc["Si", "A"]) - _log_number_ratio_ci(ci, "Li", "Si")
    assert -2.6 < diff < -2.0


def test_atmophile_elements_enriched_in_the_sun(sun, ci):
    # Published fact: C and N are incompletely condensed in CI chondrites, so the Sun is
    # richer in them relative to Si (Lodders 2003, Table 1 vs photosphere); more than
    # 0.5 dex here.
    for x in ("C", "N"):
        diff = (sun.loc[x, "A"] - sun.loc["Si", "A"]) - _log_number_ratio_ci(ci, x, "Si")
        assert diff > 0.5, x


def test_number_ratio_conversion_uses_periodictable(ci):
    # The CI-side ratio uses atomic weights from periodictable (docs/model.md section 0).
    for x in ("Mg", "Si", "Fe"):
        assert components.atomic_weight(x) == pytest.approx(
            float(periodictable.elements.symbol(x).mass))
    assert np.isfinite(_log_number_ratio_ci(ci, "Mg", "Si"))
