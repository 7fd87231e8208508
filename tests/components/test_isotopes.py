"""Isotope anomaly table (components/data/isotopes.csv) checked against published facts.

Every check names its source; "from memory" marks values typed from memory of the
publication.
"""

from __future__ import annotations

import numpy as np
import pytest

import components

CARBONACEOUS = ["CI", "CM", "CO", "CV", "CR", "CK"]
ORDINARY = ["H", "L", "LL"]
ENSTATITE = ["EH", "EL"]
CHONDRITES = CARBONACEOUS + ORDINARY + ENSTATITE
BODIES = set(CHONDRITES) | {"Earth", "Mars", "Vesta", "Moon"}
UNITS = {"D17O": "permil", "e50Ti": "epsilon", "e54Cr": "epsilon", "e48Ca": "epsilon"}


@pytest.fixture(scope="module")
def iso():
    return components.isotopes()


def value(iso, body: str, quantity: str) -> float:
    sel = iso[(iso["body"] == body) & (iso["quantity"] == quantity)]
    if len(sel) != 1:
        raise KeyError((body, quantity))
    return float(sel["value"].iloc[0])


def values(iso, bodies, quantity):
    out = {}
    for b in bodies:
        try:
            out[b] = value(iso, b, quantity)
        except KeyError:
            pass
    return out


def test_table_is_well_formed(iso):
    for col in ("body", "quantity", "value", "uncertainty", "unit", "source", "recalled"):
        assert col in iso.columns, col
    assert set(iso["body"]) <= BODIES
    assert set(iso["quantity"]) <= set(UNITS)
    assert not iso.duplicated(["body", "quantity"]).any()
    for q, unit in UNITS.items():
        assert (iso.loc[iso["quantity"] == q, "unit"] == unit).all(), q
    unc = iso["uncertainty"].dropna()
    assert (unc >= 0).all()
    # Every non-Earth row carries a 1-sigma.
    assert iso.loc[iso["body"] != "Earth", "uncertainty"].notna().all()


def test_every_row_has_a_known_source(iso):
    known = set(components.sources().index)
    for key in iso["source"]:
        for k in str(key).split(";"):
            assert k.strip() in known, k


def test_earth_is_the_zero_of_every_scale(iso):
    # The epsilon scales are defined relative to terrestrial standards, and Delta17O =
    # d17O - 0.52 d18O vanishes on the terrestrial fractionation line (convention stated in
    # the file header): Earth = 0 by definition.
    for q in UNITS:
        assert value(iso, "Earth", q) == 0.0, q


def test_core_groups_present(iso):
    # Delta17O and e54Cr are published for all groups named in the brief (Clayton & Mayeda
    # 1999; Clayton et al. 1991; Trinquier et al. 2007).
    for q in ("D17O", "e54Cr"):
        have = set(iso.loc[iso["quantity"] == q, "body"])
        assert set(CHONDRITES) | {"Earth", "Mars", "Vesta"} <= have, q


def test_enstatite_chondrites_closest_to_earth(iso):
    # Warren (2011, EPSL 311, 93) and Dauphas (2017, Nature 541, 521): among chondrites the
    # enstatite chondrites are isotopically closest to the Earth in Delta17O and e54Cr (and
    # e50Ti).
    for q in ("D17O", "e54Cr", "e50Ti"):
        v = values(iso, CHONDRITES, q)
        closest = min(v, key=lambda b: abs(v[b]))
        assert closest in ENSTATITE, (q, closest)


def test_carbonaceous_chondrites_have_positive_e54cr_and_e50ti(iso):
    # Warren (2011); Trinquier et al. (2007, ApJ 655, 1179; 2009, Science 324, 374):
    # carbonaceous chondrites carry excesses of 54Cr and 50Ti relative to Earth.
    for q in ("e54Cr", "e50Ti"):
        v = values(iso, CARBONACEOUS, q)
        assert v and all(x > 0 for x in v.values()), q


def test_ordinary_chondrites_have_negative_e54cr_and_e50ti(iso):
    # Warren (2011); Trinquier et al. (2007, 2009): ordinary chondrites have deficits.
    for q in ("e54Cr", "e50Ti"):
        v = values(iso, ORDINARY, q)
        assert len(v) == 3 and all(x < 0 for x in v.values()), q


def test_carbonaceous_noncarbonaceous_dichotomy_in_e54cr(iso):
    # Warren (2011): every carbonaceous chondrite group has higher e54Cr than every
    # non-carbonaceous material (ordinary and enstatite chondrites, Earth, Mars, Vesta, Moon).
    cc = values(iso, CARBONACEOUS, "e54Cr")
    nc = values(iso, ORDINARY + ENSTATITE + ["Earth", "Mars", "Vesta", "Moon"], "e54Cr")
    assert min(cc.values()) > max(nc.values())
    # ... and in e50Ti.
    cc = values(iso, CARBONACEOUS, "e50Ti")
    nc = values(iso, ORDINARY + ENSTATITE + ["Earth", "Mars", "Vesta", "Moon"], "e50Ti")
    assert min(cc.values()) > max(nc.values())


def test_e54cr_order_of_chondrite_groups(iso):
    # Zhu et al. (2021, GCA 301, 158), abstract (read): decreasing e54Cr
    # CI = CH >= CB >= CR >= CM ~ CV ~ CO >= CK > EC > OC.
    v = values(iso, CHONDRITES, "e54Cr")
    assert v["CI"] >= v["CR"] >= max(v["CM"], v["CV"], v["CO"])
    assert min(v["CM"], v["CV"], v["CO"]) >= v["CK"]
    assert v["CK"] > max(v["EH"], v["EL"]) > max(v["H"], v["L"], v["LL"])


def test_ordinary_chondrite_delta17o_order(iso):
    # Clayton et al. (1991, GCA 55, 2317): Delta17O rises H < L < LL, all positive
    # (H 0.73, L 1.07, LL 1.26 permil; from memory; tolerance 0.05 permil).
    v = values(iso, ORDINARY, "D17O")
    assert 0 < v["H"] < v["L"] < v["LL"]
    assert v["H"] == pytest.approx(0.73, abs=0.05)
    assert v["L"] == pytest.approx(1.07, abs=0.05)
    assert v["LL"] == pytest.approx(1.26, abs=0.05)


def test_carbonaceous_delta17o(iso):
    # Clayton & Mayeda (1999, GCA 63, 2089): CI lie slightly above the terrestrial line,
    # the other carbonaceous groups below it, with CO, CV, CK the most 16O-rich. From memory.
    v = values(iso, CARBONACEOUS, "D17O")
    assert v["CI"] > 0
    assert all(v[g] < 0 for g in ("CM", "CO", "CV", "CR", "CK"))
    assert max(v["CO"], v["CV"], v["CK"]) < min(v["CM"], v["CR"])


def test_mars_and_vesta_delta17o(iso):
    # Franchi et al. (1999, MAPS 34, 657): martian meteorites Delta17O = +0.321 +- 0.013
    # permil (from memory; tolerance 0.03). HED meteorites lie below the terrestrial line
    # near -0.2 permil (Clayton & Mayeda 1996; Greenwood et al. 2005, Nature 435, 916, give
    # -0.239 with a slope of 0.5247; from memory; tolerance 0.05).
    assert value(iso, "Mars", "D17O") == pytest.approx(0.32, abs=0.03)
    assert value(iso, "Vesta", "D17O") == pytest.approx(-0.23, abs=0.05)


def test_vesta_has_the_largest_e54cr_and_e50ti_deficits(iso):
    # Trinquier et al. (2007, 2009): eucrites (Vesta) show the most negative e54Cr
    # (about -0.7) and e50Ti (about -1.2) of the bodies listed here. From memory.
    for q in ("e54Cr", "e50Ti"):
        v = values(iso, sorted(BODIES), q)
        assert min(v, key=v.get) == "Vesta", q
    assert value(iso, "Vesta", "e54Cr") == pytest.approx(-0.73, abs=0.1)


def test_moon_is_indistinguishable_from_earth(iso):
    # Wiechert et al. (2001, Science 294, 345): lunar Delta17O equals Earth's within
    # ~0.01 permil. Zhang et al. (2012, Nat. Geosci. 5, 251): lunar e50Ti = -0.03 +- 0.04
    # (from memory). Schiller et al. (2018, Nature 555, 507), abstract (read): mu48Ca of the
    # Moon 3.7 +- 1.9 ppm, i.e. e48Ca = 0.037 +- 0.019.
    assert abs(value(iso, "Moon", "D17O")) <= 0.02
    assert abs(value(iso, "Moon", "e50Ti")) <= 0.1
    assert value(iso, "Moon", "e48Ca") == pytest.approx(0.037, abs=0.001)
    sel = iso[(iso["body"] == "Moon") & (iso["quantity"] == "e48Ca")]
    assert float(sel["uncertainty"].iloc[0]) == pytest.approx(0.019, abs=0.001)


def test_ci_spot_values(iso):
    # Trinquier et al. (2007): Orgueil e54Cr about +1.56; Trinquier et al. (2009): CI e50Ti
    # about +1.85 (both from memory; tolerance 0.1 epsilon).
    assert value(iso, "CI", "e54Cr") == pytest.approx(1.56, abs=0.1)
    assert value(iso, "CI", "e50Ti") == pytest.approx(1.85, abs=0.1)


def test_recalled_flag_present(iso):
    flags = {str(x).strip().lower() for x in iso["recalled"]}
    assert flags <= {"yes", "no", "true", "false"}
    assert np.all(iso["value"].notna())
