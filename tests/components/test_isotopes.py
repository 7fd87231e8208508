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
UNITS = {"D17O": "permil", "e50Ti": "epsilon", "e54Cr": "epsilon", "e48Ca": "epsilon",
         "e64Ni": "epsilon", "e92Mo": "epsilon", "e100Ru": "epsilon"}
PROVENANCE = {"definition", "publication", "typed_copy", "recalled"}


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


def test_provenance_levels_and_recalled_flag_agree(iso):
    # File header: recalled = yes exactly when provenance = recalled.
    assert set(iso["provenance"]) <= PROVENANCE
    flag = iso["recalled"].str.strip().str.lower() == "yes"
    assert (flag == (iso["provenance"] == "recalled")).all()


def test_every_value_not_recalled_is_checked_here(iso):
    # Each row that is not marked recalled is checked against its source in this file:
    # the zeros of the scales (test_earth_is_the_zero_of_every_scale) and the Moon's e48Ca
    # of Schiller et al. (2018) (test_moon_is_indistinguishable_from_earth).
    checked = {("Earth", q) for q in UNITS} | {("Moon", "e48Ca")}
    rows = iso[iso["provenance"] != "recalled"]
    assert {(b, q) for b, q in zip(rows["body"], rows["quantity"], strict=True)} == checked
    earth = rows[rows["body"] == "Earth"]
    assert (earth["provenance"] == "definition").all()
    assert (earth["source"] == "common_practice").all()


def test_clan_means_are_labelled(iso):
    # Where H, L, LL (or EH, EL) share a value, the note says it is a clan mean: no
    # group-resolved value was read (file header).
    for clan in (ORDINARY, ENSTATITE):
        for q in UNITS:
            sel = iso[iso["body"].isin(clan) & (iso["quantity"] == q)]
            if len(sel) > 1 and sel["value"].nunique() == 1:
                assert sel["note"].fillna("").str.contains("clan mean").all(), (clan, q)


def test_e50ti_for_every_carbonaceous_group(iso):
    # Trinquier et al. (2009, Science 324, 374); Zhang et al. (2012): every carbonaceous
    # group carries a 50Ti excess, CV and CO the largest (about +3.5), CI the smallest
    # (about +1.9). From memory; tolerance 0.5 epsilon on the extremes.
    v = values(iso, CARBONACEOUS, "e50Ti")
    assert set(v) == set(CARBONACEOUS)
    assert min(v, key=v.get) == "CI"
    assert v["CV"] == pytest.approx(3.5, abs=0.5)


def test_siderophile_systems_point_to_enstatite_chondrites(iso):
    # Dauphas (2017, Nature 541, 521), abstract (read): the mantle signatures of O, Ca, Ti,
    # Cr, Ni, Mo and Ru all point to material isotopically most similar to enstatite
    # meteorites. Among the chondrite groups, the one closest to the Earth (0) in every
    # system held is an enstatite group.
    for q in UNITS:
        v = values(iso, CHONDRITES, q)
        closest = min(v, key=lambda b: abs(v[b]))
        assert closest in ENSTATITE, (q, closest)


def test_nickel_64_anomalies(iso):
    # Steele et al. (2012, ApJ 758, 59), abstract (read): carbonaceous chondrites show the
    # largest positive e64Ni anomalies, enstatite chondrites about terrestrial values with
    # only EH matching the Earth within uncertainty, ordinary chondrites negative anomalies;
    # the chondrites span 0.84 epsilon in e64Ni (group means can only span less).
    v = values(iso, CHONDRITES, "e64Ni")
    assert all(v[g] > 0 for g in CARBONACEOUS if g in v)
    assert all(v[g] < 0 for g in ORDINARY)
    assert min(v[g] for g in CARBONACEOUS if g in v) > max(v[g] for g in ENSTATITE)
    assert abs(v["EH"]) < abs(v["EL"])
    sel = iso[(iso["body"] == "EH") & (iso["quantity"] == "e64Ni")]
    assert abs(v["EH"]) <= 2 * float(sel["uncertainty"].iloc[0])
    assert max(v.values()) - min(v.values()) <= 0.84


def test_calcium_48_excess_of_carbonaceous_chondrites(iso):
    # Huang & Jacobsen (2017, GCA 201, 364), abstract (read): carbonaceous chondrites show
    # several epsilon units of 48Ca excess, and the 48Ca anomaly correlates positively with
    # the 50Ti anomaly.
    ca = values(iso, CHONDRITES, "e48Ca")
    ti = values(iso, CHONDRITES, "e50Ti")
    assert all(ca[g] >= 1.5 for g in CARBONACEOUS if g in ca)
    both = sorted(set(ca) & set(ti))
    assert len(both) >= 5
    r = np.corrcoef([ca[g] for g in both], [ti[g] for g in both])[0, 1]
    assert r > 0.8


def test_molybdenum_and_ruthenium_dichotomy(iso):
    # Burkhardt et al. (2011, EPSL 312, 390) and Fischer-Goedde et al. (2015, GCA 168,
    # 151), from memory: carbonaceous chondrites have the largest s-process deficits,
    # i.e. the highest e92Mo and the lowest e100Ru except CI, whose e100Ru is close to the
    # ordinary chondrites'; ordinary chondrites lie between enstatite chondrites and them.
    mo = values(iso, CHONDRITES, "e92Mo")
    ru = values(iso, CHONDRITES, "e100Ru")
    assert min(mo[g] for g in CARBONACEOUS if g in mo) > max(mo[g] for g in ORDINARY)
    assert min(mo[g] for g in ORDINARY) > max(mo[g] for g in ENSTATITE) > 0
    assert max(ru[g] for g in ORDINARY) < min(ru[g] for g in ENSTATITE) < 0
    assert all(ru[g] < ru["CI"] for g in ("CM", "CO", "CV"))
