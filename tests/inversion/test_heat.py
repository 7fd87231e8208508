"""Radiogenic heat production (inversion/heat.py) against published values and decay law."""

from __future__ import annotations

import math

import numpy as np
import pytest

import components
from inversion.heat import (
    ELEMENT_HEAT_W_PER_KG,
    ISOTOPES,
    heat_history,
    heat_production,
    isotope_mass_fraction,
)

# Mass of the Earth's mantle plus crust [kg] (the silicate Earth; Turcotte & Schubert
# 2014, from memory: mantle 4.0e24 kg, crust ~2.6e22 kg; we use 4.0e24 as in the brief).
SILICATE_EARTH_KG = 4.0e24


def test_bulk_silicate_earth_gives_about_20_TW():
    # Published: the bulk silicate Earth of McDonough & Sun (1995) produces ~20 TW of
    # radiogenic heat (Turcotte & Schubert 2014, Geodynamics, section 4.5; from memory).
    # Tolerance 18-22 TW: the published figure is quoted to two digits, and the mantle
    # mass (4.0e24 kg) is itself rounded.
    bse = components.load("BSE_MS95").composition
    h = heat_production(bse["U"], bse["Th"], bse["K"])[0]
    total_tw = h * SILICATE_EARTH_KG / 1e12
    assert 18.0 <= total_tw <= 22.0, total_tw


@pytest.mark.parametrize("element", ["U", "Th", "K"])
def test_isotopes_reproduce_the_per_element_values(element):
    # Turcotte & Schubert (2014) Table 4.2 per element (9.81e-5, 2.64e-5, 3.48e-9 W/kg)
    # from the per-isotope values and the isotopic abundances (IUPAC/CIAAW, from memory):
    # agreement within 0.5 % (the table's rounding of three significant digits and of the
    # 40K abundance).
    c = {"U": 0.0, "Th": 0.0, "K": 0.0}
    c[element] = 1.0
    h = heat_production(c["U"], c["Th"], c["K"])[0]
    assert h == pytest.approx(ELEMENT_HEAT_W_PER_KG[element], rel=5e-3)


def test_isotope_mass_fractions():
    # 235U is 0.720 atom % of natural uranium, 0.711 % by mass; 40K is 0.0117 atom % of
    # potassium, ~0.0120 % by mass (IUPAC/CIAAW, from memory).
    assert isotope_mass_fraction("235U") == pytest.approx(0.00711, abs=2e-5)
    assert isotope_mass_fraction("40K") == pytest.approx(1.20e-4, rel=0.01)
    assert isotope_mass_fraction("232Th") == 1.0


@pytest.mark.parametrize("iso", ISOTOPES, ids=lambda i: i.name)
def test_history_doubles_one_half_life_ago(iso):
    # Exponential decay: one half-life before present each isotope produced twice today's
    # heat. Isolate the isotope by giving its element alone and removing the others'
    # share (the other uranium isotope decays at its own rate).
    c = {"U": 0.0, "Th": 0.0, "K": 0.0}
    c[iso.element] = 1.0
    t = iso.half_life_gyr
    now = heat_history(c["U"], c["Th"], c["K"], (0.0,))[0, 0]
    then = heat_history(c["U"], c["Th"], c["K"], (t,))[0, 0]
    others = [j for j in ISOTOPES if j.element == iso.element and j.name != iso.name]
    share_now = isotope_mass_fraction(iso.name) * iso.w_per_kg
    other_then = sum(isotope_mass_fraction(j.name) * j.w_per_kg
                     * math.exp(math.log(2) * t / j.half_life_gyr) for j in others)
    other_now = now - share_now
    assert other_now == pytest.approx(sum(isotope_mass_fraction(j.name) * j.w_per_kg
                                          for j in others), rel=1e-12, abs=1e-30)
    assert then - other_then == pytest.approx(2.0 * share_now, rel=1e-12)


def test_history_is_vectorised_and_rises_into_the_past():
    c_u = np.array([10e-9, 20e-9])
    h = heat_history(c_u, 4 * c_u, 1e4 * c_u, (0.0, 1.0, 4.5))
    assert h.shape == (2, 3)
    assert np.all(np.diff(h, axis=1) > 0)
    assert h[1] == pytest.approx(2 * h[0])
