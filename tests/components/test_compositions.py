"""Composition library (components/data/compositions) checked against published values.

Three kinds of check:

* typed copy checks against pyrolite's reference compositions, an independent
  typed copy of the same or of a neighbouring publication (our tables were typed
  without reading pyrolite's files);
* physical sanity of every component (no negative values, totals near 100 wt%);
* ratio facts from the literature, each with its source named beside the value.

"from memory" marks check values typed from memory of the publication rather than read
from it at the time of writing.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import periodictable
import pytest

import components

CI = "CI"
CARBONACEOUS = ["CM", "CO", "CV", "CK", "CR"]
ORDINARY = ["H", "L", "LL"]
ENSTATITE = ["EH", "EL"]
GROUPS = CARBONACEOUS + ORDINARY + ENSTATITE
BSE = ["BSE_MS95", "BSE_PO14"]
ALL = [CI, *GROUPS, *BSE]

UNIT = {"%": 1e-2, "wt%": 1e-2, "ppm": 1e-6, "ppb": 1e-9}


def _pyrolite(name: str) -> pd.Series:
    """A pyrolite reference composition as mass fractions (elements only)."""
    norm = pytest.importorskip("pyrolite.geochem.norm")
    ref = norm.get_reference_composition(name)
    comp = pd.to_numeric(ref.comp, errors="coerce")
    factor = ref.units.map(UNIT)
    out = (comp * factor).dropna()
    out = out[[isinstance(i, str) and len(i) <= 2 and i[0].isupper() for i in out.index]]
    return out[out > 0]


def _molar(comp: pd.Series, a: str, b: str) -> float:
    wa = periodictable.elements.symbol(a).mass
    wb = periodictable.elements.symbol(b).mass
    return float((comp[a] / wa) / (comp[b] / wb))


@pytest.fixture(scope="module")
def lib() -> dict[str, components.Component]:
    return {name: components.load(name) for name in ALL}


@pytest.fixture(scope="module")
def cosmo_class() -> pd.Series:
    return components.elements()["cosmochemical_class"]


# ---------------------------------------------------------------------------- inventory

def test_every_component_is_available_with_its_kind(lib):
    names = set(components.available())
    assert set(ALL) <= names
    assert lib[CI].kind == "chondrite"
    for g in GROUPS:
        assert lib[g].kind == "chondrite", g
    for b in BSE:
        assert lib[b].kind == "silicate_reference", b
    assert set(components.available("silicate_reference")) >= set(BSE)


def test_sources_are_cited(lib):
    table = components.sources()
    for name, comp in lib.items():
        for key in comp.source_keys:
            assert key in table.index, (name, key)
            assert table.loc[key, "citation"].strip(), key
    # the keys this library is built from
    assert {"lodders2003", "wassonkallemeyn1988", "loddersfegley1998", "mcdonoughsun1995",
            "palmeoneill2014", "common_practice"} <= set(table.index)


def test_element_counts(lib):
    # Lodders (2003) Table 3 covers H to U; we hold at least 70 elements of it.
    assert len(lib[CI].composition) >= 70
    # McDonough & Sun (1995) Table 5: H to U, O included.
    assert len(lib["BSE_MS95"].composition) >= 75
    assert len(lib["BSE_PO14"].composition) >= 60
    majors = {"Mg", "Si", "Fe", "Al", "Ca", "Na", "Ni", "Mn"}
    for g in GROUPS:
        assert majors <= set(lib[g].composition.index), g


def test_provenance_levels_say_how_each_value_was_obtained(lib):
    for name, comp in lib.items():
        assert comp.recalled.dtype == bool, name
        assert set(comp.provenance.index) == set(comp.composition.index), name
        assert set(comp.provenance) <= set(components.PROVENANCE_LEVELS), name
        # recalled is the provenance level, not a separate flag
        assert (comp.recalled == (comp.provenance == "recalled")).all(), name
    # The group means come from an unattributed typed copy (see file headers), except the
    # majors of CM, CV and H checked against an attributed (normalised) copy of Lodders &
    # Fegley (1998), oxygen from a named typed copy, the Wasson & Kallemeyn (1988) rows
    # typed from memory and the CI-scaled rows.
    checked = {"Mg", "Al", "Si", "S", "Ca", "Fe"}
    expected_source = {"unattributed_copy": {"unattributed_copy_hezel2000"},
                       "typed_copy": {"loddersfegley1998", "typedcopy_trinh_wk",
                                      "typedcopy_trinh_md2021"},
                       "recalled": {"wassonkallemeyn1988"},
                       "derived": {"derived_ci_scaled"}}
    for g in GROUPS:
        comp = lib[g]
        for level, keys in expected_source.items():
            assert set(comp.sources[comp.provenance == level]) <= keys, (g, level)
        # O, and K, Cl of the ordinary and enstatite groups: the named typed copy
        typed = set(comp.provenance.index[(comp.provenance == "typed_copy")
                                          & (comp.sources != "typedcopy_trinh_wk")]) - {"O"}
        assert typed == (checked if g in ("CM", "CV", "H") else set()), g
        assert (comp.provenance == "unattributed_copy").sum() >= 27, g
    # Most of the CI table was checked against a typed copy of Lodders (2003) Table 3.
    assert (lib[CI].provenance == "typed_copy").sum() >= 55
    # file names say what the values are
    for g in GROUPS:
        assert lib[g].path.endswith(f"{g.lower()}_unattributed_copy.csv"), lib[g].path


def test_every_building_block_value_has_an_uncertainty(lib):
    for name in [CI, *GROUPS]:
        comp = lib[name]
        assert comp.uncertainty.notna().all(), name
        basis = comp.uncertainty_basis
        assert set(basis) <= {"source", "default", "spread"}, name
        rel = comp.uncertainty / comp.composition
        for el in basis.index[basis == "default"]:
            want = components.default_relative_uncertainty(el, comp.provenance[el])
            # stored with two significant digits
            assert rel[el] == pytest.approx(want, rel=0.05), (name, el)
    # derived and recalled values carry larger defaults than copied ones (FORMAT.md)
    d = components.default_relative_uncertainty
    assert d("Zr", "derived") > d("Zr", "recalled") > d("Zr", "unattributed_copy") > d(
        "Zr", "typed_copy") > d("Zr", "publication")
    assert d("Zr", "derived") == pytest.approx(np.hypot(0.08, 0.20))


# ---------------------------------------------------------------------- physical sanity

@pytest.mark.parametrize("name", ALL)
def test_no_negative_values_and_sane_uncertainties(lib, name):
    comp = lib[name]
    assert (comp.composition > 0).all()
    assert np.isfinite(comp.composition).all()
    assert comp.composition.max() < 1.0
    unc = comp.uncertainty.dropna()
    assert (unc >= 0).all()
    # a 1-sigma larger than the value itself would be a unit slip
    assert (unc <= comp.composition[unc.index]).all(), unc[unc > comp.composition[unc.index]]


def test_ci_element_total(lib):
    # Lodders (2003) Table 3 gives O by difference to 100%: the total must close to ~100 wt%.
    total = lib[CI].composition.sum()
    assert abs(total - 1.0) < 0.03, total


def test_bse_ms95_element_total(lib):
    # McDonough & Sun (1995) Table 5 tabulates O (44.0 wt%): element total ~100 wt%.
    total = lib["BSE_MS95"].composition.sum()
    assert abs(total - 1.0) < 0.02, total


OXIDES = ["SiO2", "MgO", "FeO", "Al2O3", "CaO", "Na2O", "K2O", "TiO2", "Cr2O3", "MnO", "NiO",
          "CoO", "P2O5"]


def _oxide_total(comp: pd.Series) -> float:
    total = 0.0
    for ox in OXIDES:
        f = periodictable.formula(ox)
        el = next(str(a) for a in f.atoms if str(a) != "O")
        n_el = f.atoms[periodictable.elements.symbol(el)]
        if el not in comp.index:
            continue
        total += comp[el] * f.mass / (n_el * periodictable.elements.symbol(el).mass)
    return total


@pytest.mark.parametrize("name", BSE)
def test_bse_oxide_totals(lib, name):
    # Both authors give the mantle as oxides summing to ~100 wt% (all Fe as FeO).
    total = _oxide_total(lib[name].composition)
    assert abs(total - 1.0) < 0.015, total


@pytest.mark.parametrize("name", GROUPS)
def test_chondrite_groups_close_with_lithophile_oxygen(lib, name):
    # The group tables hold no O, H, C. The listed elements plus the oxygen bound to the
    # lithophile majors (SiO2, MgO, Al2O3, CaO, Na2O, K2O, TiO2, Cr2O3, MnO; Fe counted as
    # metal/sulfide) must fall between ~75 wt% (CM: FeO, water and organics missing) and
    # ~103 wt% (a gross unit slip or a wrong major would break this).
    comp = lib[name].composition
    if "O" in comp.index:
        # oxygen tabulated (Wasson & Kallemeyn 1988 values via a typed copy; Lodders &
        # Fegley 1998 copy for CM, CV, CO): the element total itself closes to 100 wt%
        # within the scatter of mixing two compilations (+-6%).
        total = comp.sum()
        assert 0.90 < total < 1.04, total
        return
    o = 0.0
    for ox in ["SiO2", "MgO", "Al2O3", "CaO", "Na2O", "K2O", "TiO2", "Cr2O3", "MnO"]:
        f = periodictable.formula(ox)
        el = next(str(a) for a in f.atoms if str(a) != "O")
        if el in comp.index:
            n_el = f.atoms[periodictable.elements.symbol(el)]
            o += comp[el] * f.atoms[periodictable.elements.O] * 15.999 / (
                n_el * periodictable.elements.symbol(el).mass)
    total = comp.sum() + o
    assert 0.75 < total < 1.03, total


# -------------------------------------------------- CI against independent typed copies

def _tolerance(el: str, cosmo: pd.Series, lith: float, vol: float) -> float:
    cls = cosmo.get(el, "highly_volatile")
    return lith if cls in ("refractory", "main_component") else vol


def test_ci_against_palme_lodders_jones_2014(lib, cosmo_class):
    """Lodders (2003) against Palme, Lodders & Jones (2014) (pyrolite 'Chondrite_PON').

    Different compilations of the same five meteorites: refractory and main-component
    elements agree to 10%; moderately and highly volatile elements and the HSE to 25%
    (mobile in the aqueously altered CI matrix, fewer analyses). Be: 20%, because Lodders
    (2003) 0.0252 ppm was revised downwards in later compilations (0.0219 ppm in 2014).
    """
    ours = lib[CI].composition
    ref = _pyrolite("Chondrite_PON")
    common = ours.index.intersection(ref.index)
    assert len(common) >= 70
    bad = {}
    for el in common:
        tol = 0.20 if el == "Be" else _tolerance(el, cosmo_class, 0.10, 0.25)
        r = ours[el] / ref[el]
        if abs(r - 1) > tol:
            bad[el] = round(r, 3)
    assert not bad, bad


def test_ci_against_mcdonough_sun_1995(lib, cosmo_class):
    """Lodders (2003) against McDonough & Sun (1995) CI (pyrolite 'Chondrite_MS95').

    M&S 1995 predates many of the analyses Lodders (2003) averages: refractory elements
    15% (their U 7.4 ppb and Hf 103 ppb are 12-14% below Lodders), volatiles and HSE 30%
    (their B 0.9 ppm is 21% above).
    pyrolite's copy stores N and P as 3.18 and 1.08 ppm; McDonough & Sun give 3180 and
    1080 ug/g (their Table 1, as also copied in other compilations): a unit slip of x1000
    in pyrolite. Those two are checked for the slip (or its repair), not for agreement.
    """
    ours = lib[CI].composition
    ref = _pyrolite("Chondrite_MS95")
    common = ours.index.intersection(ref.index)
    assert len(common) >= 70
    bad = {}
    for el in common:
        r = ours[el] / ref[el]
        if el in ("N", "P"):
            assert abs(r - 1) < 0.3 or abs(r / 1000 - 1) < 0.3, (el, r)
            continue
        tol = _tolerance(el, cosmo_class, 0.15, 0.30)
        if abs(r - 1) > tol:
            bad[el] = round(r, 3)
    assert not bad, bad


def test_ci_uncertainties_are_lodders_table3_sigmas(lib):
    # Lodders (2003) Table 3 gives the 1-sigma of the weighted group mean in ppm, e.g.
    # Mg 95870 +- 780, Si 106500 +- 1250, Fe 182800 +- 1470, N 2940 +- 20, P 920 +- 100
    # (read from a typed copy of the table).
    unc = lib[CI].uncertainty
    for el, s in {"Mg": 780, "Si": 1250, "Fe": 1470, "N": 20, "P": 100}.items():
        assert unc[el] == pytest.approx(s * 1e-6, rel=1e-9), el
    assert unc.notna().sum() >= 50


# ------------------------------------------------ BSE against independent typed copies

def test_bse_ms95_against_pyrolite(lib):
    """Same publication (McDonough & Sun 1995 Table 5): a typed copy check at 2%."""
    ours = lib["BSE_MS95"].composition
    ref = _pyrolite("Pyrolite_MS95")
    common = ours.index.intersection(ref.index)
    assert len(common) >= 74
    ratio = ours[common] / ref[common]
    bad = ratio[(ratio - 1).abs() > 0.02]
    assert bad.empty, bad.round(3).to_dict()


def test_bse_po14_against_pyrolite(lib, cosmo_class):
    """Same publication (Palme & O'Neill 2014): a typed copy check.

    2% for refractory and main-component elements; 5% for the volatile and siderophile
    trace elements, where our typed As (0.066 ppm) and Se (0.079 ppm) differ by 3-4% from
    pyrolite's copy and could not be settled against the paper (both flagged recalled).
    """
    ours = lib["BSE_PO14"].composition
    ref = _pyrolite("PM_PON")
    common = ours.index.intersection(ref.index)
    assert len(common) >= 60
    bad = {}
    for el in common:
        tol = _tolerance(el, cosmo_class, 0.02, 0.05)
        r = ours[el] / ref[el]
        if abs(r - 1) > tol:
            bad[el] = round(r, 3)
    assert not bad, bad


# --------------------------------------------------------------------------- ratio facts

def test_ci_mg_si(lib):
    # Lodders (2003) Table 3: Mg 95870 ppm, Si 106500 ppm -> molar Mg/Si = 1.04.
    # (Anders & Grevesse 1989 give 1.074 atoms Mg per Si; Lodders' CI is a little lower.)
    assert _molar(lib[CI].composition, "Mg", "Si") == pytest.approx(1.04, abs=0.02)


@pytest.mark.parametrize("group,mgsi", [
    # Wasson & Kallemeyn (1988) group means, molar Mg/Si (from memory)
    ("H", 0.96), ("L", 0.93), ("LL", 0.94),   # ordinary chondrites: sub-CI Mg/Si
    ("EH", 0.73), ("EL", 0.87),               # enstatite chondrites: strongly sub-CI
    ("CM", 1.05), ("CO", 1.06), ("CV", 1.07), # carbonaceous: CI-like
    # Lodders & Fegley (1998) compilation (from memory): CK, CR CI-like as well
    ("CK", 1.07), ("CR", 1.05),
])
def test_group_mg_si(lib, group, mgsi):
    assert _molar(lib[group].composition, "Mg", "Si") == pytest.approx(mgsi, abs=0.03)


def _ci_normalised_ratio(lib, name: str, a: str, b: str) -> float:
    """(a/b) of a library component over (a/b) of CI, by mass."""
    c, ci = lib[name].composition, lib[CI].composition
    return float((c[a] / c[b]) / (ci[a] / ci[b]))


def test_refractory_lithophile_enrichment_pattern(lib):
    # CI-normalised Al/Si: CV is the refractory-enriched group (~1.35 x CI, Wasson &
    # Kallemeyn 1988, from memory); CM, CO above CI; ordinary and enstatite chondrites below
    # CI (refractory-depleted relative to Si), EH lowest.
    def al_si(name):
        return _ci_normalised_ratio(lib, name, "Al", "Si")

    assert al_si("CV") == pytest.approx(1.35, abs=0.12)
    assert al_si("CV") > al_si("CO") > 1.0
    assert al_si("CM") > 1.0
    for g in ORDINARY + ENSTATITE:
        assert al_si(g) < 1.0, g
    assert al_si("EH") == min(al_si(g) for g in ORDINARY + ENSTATITE)


def test_group_siderophile_order(lib):
    # Metal content H > L > LL (the groups' names; Wasson & Kallemeyn 1988): Fe, Ni, Co, Ir.
    for el in ("Fe", "Ni", "Co", "Ir"):
        vals = [lib[g].composition[el] for g in ORDINARY]
        assert vals[0] > vals[1] > vals[2], el
    # EH richer in Fe and in the moderately volatile Zn than EL (Wasson & Kallemeyn 1988).
    assert lib["EH"].composition["Fe"] > lib["EL"].composition["Fe"]
    assert lib["EH"].composition["Zn"] > 5 * lib["EL"].composition["Zn"]


def test_volatile_depletion_of_carbonaceous_groups(lib):
    # Zn/Mg normalised to CI falls CI > CM > CO ~ CV (Wasson & Kallemeyn 1988: CM ~0.5,
    # CO and CV ~0.25 x CI; from memory): the classic carbonaceous volatility sequence.
    def zn(name):
        return _ci_normalised_ratio(lib, name, "Zn", "Mg")

    assert zn("CM") == pytest.approx(0.5, abs=0.1)
    assert zn("CO") == pytest.approx(0.25, abs=0.07)
    assert zn("CV") == pytest.approx(0.25, abs=0.07)


@pytest.mark.parametrize("name,mgsi", [
    # McDonough & Sun (1995) Table 5: Mg 22.8, Si 21.0 wt% -> molar Mg/Si 1.25
    ("BSE_MS95", 1.25),
    # Palme & O'Neill (2014): MgO 36.77, SiO2 45.40 wt% -> molar Mg/Si 1.21 (from memory)
    ("BSE_PO14", 1.21),
])
def test_bse_mg_si(lib, name, mgsi):
    assert _molar(lib[name].composition, "Mg", "Si") == pytest.approx(mgsi, abs=0.02)


@pytest.mark.parametrize("name", BSE)
def test_bse_refractory_lithophiles_chondritic_relative_to_mg(lib, name):
    """RLE/Mg in the BSE, normalised to CI, is ~1.1-1.3 and the same for every RLE.

    Palme & O'Neill (2014) put the refractory lithophile elements of the primitive mantle at
    2.83 x CI (from memory; pyrolite's PM_PON / Chondrite_PON ratios equal 2.83 for the RLE)
    and Mg at ~2.3 x CI, i.e. (RLE/Mg)_CI-normalised ~1.2; McDonough & Sun (1995) have the
    RLE at ~2.75 x CI on a volatile-free basis, a little lower against Mg (~1.15).
    """
    ci = lib[CI].composition
    bse = lib[name].composition
    ratios = {}
    for el in ("Al", "Ca", "Sc", "Ti", "Sm", "Yb"):
        ratios[el] = (bse[el] / bse["Mg"]) / (ci[el] / ci["Mg"])
    for el, r in ratios.items():
        assert 1.1 < r < 1.3, (el, r)
    vals = np.array(list(ratios.values()))
    assert vals.max() / vals.min() < 1.10  # chondritic relative proportions among the RLE


def test_po14_rle_factor(lib):
    # Palme & O'Neill (2014): refractory lithophiles at 2.83 x CI (their CI of Palme,
    # Lodders & Jones 2014; from memory). Against Lodders (2003) CI the factor holds to 3%
    # for Al, Ca, Sc, Ti, where the two CI compilations agree; for REE, Hf, Zr, Th, U the
    # two CI compilations differ by up to 8%, so the factor is checked to 10% there.
    ci = lib[CI].composition
    pm = lib["BSE_PO14"].composition
    for el in ("Al", "Ca", "Sc", "Ti"):
        assert pm[el] / ci[el] == pytest.approx(2.83, rel=0.03), el
    for el in ("La", "Ce", "Nd", "Sm", "Eu", "Yb", "Lu", "Hf", "Zr", "Th", "U", "Sr", "Y"):
        assert pm[el] / ci[el] == pytest.approx(2.83, rel=0.10), el


def test_bse_heat_producers(lib):
    # McDonough & Sun (1995): K 240 ppm, Th 79.5 ppb, U 20.3 ppb; K/U ~1.2e4 and Th/U ~3.9
    # (the usual figures quoted from that paper).
    c = lib["BSE_MS95"].composition
    assert c["K"] / c["U"] == pytest.approx(1.2e4, rel=0.05)
    assert c["Th"] / c["U"] == pytest.approx(3.9, rel=0.03)
    unc = lib["BSE_MS95"].uncertainty
    # their approximate uncertainties: U +-20%, Th +-15%, K +-20%
    assert unc["U"] / c["U"] == pytest.approx(0.20)
    assert unc["Th"] / c["Th"] == pytest.approx(0.15)
    assert unc["K"] / c["K"] == pytest.approx(0.20)
