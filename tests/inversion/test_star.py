"""Star to planet (inversion/star.py, inversion/handoff.py, `planetmix star`).

Check values name their source; "from memory" marks values recalled from the publication.
"""

from __future__ import annotations

import json
import math
from dataclasses import replace

import numpy as np
import pandas as pd
import pytest

import components
from inversion.cli import main
from inversion.exceptions import InputError
from inversion.handoff import STATS, PlanetDraws, write_handoff
from inversion.model import _core_split
from inversion.star import (
    STAR_ELEMENTS,
    Pattern,
    StarInput,
    StarSettings,
    core_split_fast,
    earth_calibrated_pattern,
    read_pattern,
    read_star_table,
    run_star,
    star_model,
)

TEMPLATE = "data_templates/star_abundances.csv"


@pytest.fixture(scope="module")
def earth_pattern() -> Pattern:
    return earth_calibrated_pattern()


@pytest.fixture(scope="module")
def settings(earth_pattern) -> StarSettings:
    return StarSettings(pattern=earth_pattern, draws=1, seed=0)


def _star(**xh: float) -> StarInput:
    vals = dict.fromkeys(STAR_ELEMENTS, 0.0)
    vals.update(xh)
    return StarInput("test", vals, dict.fromkeys(STAR_ELEMENTS, 0.0))


def test_earth_pattern_is_the_engine_fit(earth_pattern):
    # The BSE vs CI fit of the engine (tests/inversion: T0 ~1362 K, slope ~0.002 dex/K).
    assert earth_pattern.label == "Earth-calibrated (BSE_MS95 vs CI)"
    T0, slope = earth_pattern.params
    assert 1250 < T0 < 1450
    assert 0.001 < slope < 0.004


def test_sun_gives_an_earth_like_planet(settings):
    # The Sun ([X/H] = 0) with the Earth-calibrated pattern and the Earth's mantle FeO
    # (8.0 wt%; McDonough & Sun 1995: 8.05 wt%).
    # Earth values (from memory): CMF 0.325 (core 1.94e24 kg of 5.97e24 kg; Stacey & Davis
    # 2008, Physics of the Earth; McDonough 2003); bulk Earth of McDonough (2003, Treatise
    # on Geochemistry vol. 2): Fe 32.0, Mg 15.4, Si 16.1 wt% -> molar Fe/Mg 0.90,
    # Mg/Si 1.10.
    # Tolerances, with their reasons:
    # - CMF +-0.02 and Fe/Mg +-0.12: the Sun's own Fe/Mg is 0.81 by atoms (Asplund et al.
    #   2021: A(Fe) 7.46, A(Mg) 7.55), 10 % below the Earth's, so a planet of solar
    #   composition carries less iron (this engine's own Earth fit from CI gives CMF 0.31).
    # - bulk Mg/Si +-0.2: the Earth-calibrated kinked pattern (pivot ~1362 K) removes Si
    #   (Tc 1310 K) by ~0.05 dex more than Mg (Tc 1336 K) and the Earth-calibrated D_Si
    #   also puts ~6 wt% Si into the core; the bulk estimate of McDonough (2003) puts the
    #   whole Si deficit of the mantle into the core. The Sun's Mg/Si (1.10 by atoms) is
    #   also 5 % above CI's (1.04, Lodders 2003). The model gives ~1.24.
    res = run_star(_star(), settings)
    d = res.draws
    assert d.core_mass_fraction[0] == pytest.approx(0.325, abs=0.02)
    assert d.molar_ratios["Fe/Mg_bulk"][0] == pytest.approx(0.90, abs=0.12)
    assert d.molar_ratios["Mg/Si_bulk"][0] == pytest.approx(1.10, abs=0.2)
    assert d.mantle_oxides_wt["FeO"][0] == pytest.approx(8.0, rel=1e-9)
    # Earth's core (McDonough 2003, from memory): Fe 85.5, Ni 5.2, Si 6.0 wt%.
    assert d.core_wt["Fe"][0] == pytest.approx(85.5, abs=3.0)
    assert d.core_wt["Ni"][0] == pytest.approx(5.2, abs=1.5)
    assert "U" in res.ci_reference  # no photospheric U in Asplund et al. (2021)


def test_without_depletion_the_bulk_keeps_the_solar_ratios(earth_pattern):
    # Simulate-then-recover: with a zero slope nothing is lost, so the bulk planet's molar
    # ratios are the Sun's photospheric ones (Asplund et al. 2021 Table 2, the library's
    # own table), whatever the core takes.
    flat = replace(earth_pattern, params=(earth_pattern.params[0], 0.0))
    s = StarSettings(pattern=flat, draws=1)
    sun = components.solar("asplund2021")["A"]
    d = run_star(_star(Mg=0.1, Fe=-0.2), s).draws
    assert d.molar_ratios["Mg/Si_bulk"][0] == pytest.approx(
        10 ** (sun["Mg"] + 0.1 - sun["Si"]), rel=1e-12)
    assert d.molar_ratios["Fe/Mg_bulk"][0] == pytest.approx(
        10 ** (sun["Fe"] - 0.2 - sun["Mg"] - 0.1), rel=1e-12)
    assert d.molar_ratios["Ca/Al_bulk"][0] == pytest.approx(
        10 ** (sun["Ca"] - sun["Al"]), rel=1e-12)


def test_fast_core_split_equals_the_engine(settings):
    # The Newton solution reaches the engine's fixed point (30 plain iterations).
    model = star_model(settings)
    p = model.problem
    rng = np.random.default_rng(3)
    xh = rng.normal(0.0, 0.15, (400, len(STAR_ELEMENTS)))
    mg = p.ref_index
    a = 10 ** ((model.A_ref + xh) - (model.A_ref[mg] + xh[:, mg:mg + 1])
               + model.log_mass - model.log_mass[mg] + model.logr)
    fast = core_split_fast(a, p, p.D)
    ref = _core_split(a, p, p.D)
    for key in ("mantle", "core", "M_s", "M_c", "k"):
        np.testing.assert_allclose(fast[key], ref[key], rtol=1e-9, atol=1e-14, err_msg=key)


def test_raising_fe_raises_the_core_mass_fraction(settings):
    cmf = [run_star(_star(Fe=x), settings).draws.core_mass_fraction[0]
           for x in np.linspace(-0.4, 0.4, 9)]
    assert np.all(np.diff(cmf) > 0), cmf


def test_raising_mg_raises_mantle_mg_si(settings):
    r = [run_star(_star(Mg=x), settings).draws.molar_ratios["Mg/Si_mantle"][0]
         for x in np.linspace(-0.4, 0.4, 9)]
    assert np.all(np.diff(r) > 0), r


def test_more_oxidised_means_a_smaller_core(earth_pattern):
    # dIW path (the engine's mass balance): more FeO in the mantle, less metal.
    cmf = [run_star(_star(), StarSettings(pattern=earth_pattern, mantle_FeO_wt=None,
                                          dIW=x, draws=1)).draws.core_mass_fraction[0]
           for x in (-3.0, -2.0, -1.0)]
    assert np.all(np.diff(cmf) < 0), cmf


def test_monte_carlo_spread_follows_the_uncertainty(earth_pattern):
    s = StarSettings(pattern=earth_pattern, draws=400, seed=7)
    star = StarInput("spread", {"Fe": 0.0, "Mg": 0.0, "Si": 0.0},
                     {"Fe": 0.05, "Mg": 0.0, "Si": 0.0})
    d = run_star(star, s).draws
    # [Fe/H] draws are N(0, 0.05); Fe/Mg bulk is 10**[Fe/H] times the solar value, so
    # log10 of it has a standard deviation 0.05 dex (sampling error ~4 % at 400 draws).
    sd = np.std(np.log10(d.molar_ratios["Fe/Mg_bulk"]))
    assert sd == pytest.approx(0.05, rel=0.15)
    again = run_star(star, s).draws
    np.testing.assert_array_equal(d.core_mass_fraction, again.core_mass_fraction)
    other = run_star(star, replace(s, seed=8)).draws
    assert not np.array_equal(d.core_mass_fraction, other.core_mass_fraction)


def test_missing_elements_follow_fe_and_are_flagged(settings):
    star = StarInput("partial", {"Fe": 0.3, "Mg": 0.0, "Si": 0.0},
                     {"Fe": 0.0, "Mg": 0.0, "Si": 0.0})
    res = run_star(star, settings)
    assert "Ni" in res.solar_ratio and "Fe" not in res.solar_ratio
    full = run_star(_star(**{e: 0.3 for e in STAR_ELEMENTS
                                     if e not in ("Mg", "Si")}), settings)
    assert res.draws.core_mass_fraction[0] == pytest.approx(
        full.draws.core_mass_fraction[0], rel=1e-12)


def test_read_star_table_errors(tmp_path):
    ok = read_star_table(TEMPLATE)
    assert ok.values["Fe"] == pytest.approx(0.10)
    cases = {
        "element,value,uncertainty\nFe,abc,0.05\n": "not a number",
        "element,value,uncertainty\nFe,0.1,\n": "missing uncertainty",
        "element,value,uncertainty\nXx,0.1,0.05\n": "element symbol",
        "element,value,uncertainty\nFe,0.1,0.05\nFe,0.2,0.05\n": "listed twice",
        "element,value\nFe,0.1\n": "uncertainty",
        "element,value,uncertainty\nFe,0.1,-1\n": "non-negative",
    }
    for i, (text, match) in enumerate(cases.items()):
        path = tmp_path / f"s{i}.csv"
        path.write_text(text)
        with pytest.raises(InputError, match=match):
            read_star_table(path)


def test_read_pattern(tmp_path, earth_pattern):
    fit = {"title": "t", "volatility": {"form": "kinked", "T0": 1300.0, "slope": 0.003},
           "provenance": {"condensation_table": "lodders2003"}}
    (tmp_path / "fit.json").write_text(json.dumps(fit))
    p = read_pattern(tmp_path / "fit.json")
    assert p.params == (1300.0, 0.003) and p.form == "kinked"
    # sample.json as bayes_cli writes it: posterior medians and 90 % intervals
    sample = {"posterior": {"volatility": {
        "form": "kinked", "T0": {"median": 1310.0, "q05": 1250.0, "q95": 1380.0},
        "slope": {"median": 0.002, "q05": 0.001, "q95": 0.003}}},
        "provenance": {"reference_tables": ["wood2019", "mcdonough2003"]}}
    (tmp_path / "sample.json").write_text(json.dumps(sample))
    ps = read_pattern(tmp_path / "sample.json")
    assert ps.params == (1310.0, 0.002) and ps.condensation_table == "wood2019"
    (tmp_path / "bad.json").write_text(json.dumps({"volatility": {"form": "kinked",
                                                                  "T0": 1300.0}}))
    with pytest.raises(InputError, match="slope"):
        read_pattern(tmp_path / "bad.json")
    (tmp_path / "bad2.json").write_text(json.dumps({"volatility": {"form": "wiggly"}}))
    with pytest.raises(InputError, match="volatility form"):
        read_pattern(tmp_path / "bad2.json")


def test_handoff_point_estimate_collapses(tmp_path):
    d = PlanetDraws(core_mass_fraction=np.array([0.31]),
                    mantle_oxides_wt={"MgO": np.array([38.0])},
                    core_wt={"Fe": np.array([86.0])},
                    molar_ratios={"Mg/Si_bulk": np.array([1.1])})
    data = write_handoff(tmp_path, d)
    assert all(data["core_mass_fraction"][s] == 0.31 for s in STATS)
    df = pd.read_csv(tmp_path / "planet_draws.csv")
    assert len(df) == 1 and df["core_mass_fraction"].iloc[0] == 0.31


def test_star_command_writes_the_handoff(tmp_path, capsys):
    out = tmp_path / "out"
    rc = main(["star", TEMPLATE, "--out", str(out), "--draws", "200",
               "--planet-mass-kg", "5.972e24", "--seed", "3"])
    assert rc == 0
    text = capsys.readouterr().out
    assert "condensation temperatures depend on the disk's composition" in text
    data = json.loads((out / "planet.json").read_text())
    for key in ("core_mass_fraction", "mantle_oxides_wt", "core_wt", "molar_ratios",
                "heat_production"):
        assert key in data
    for s in STATS:
        assert math.isfinite(data["core_mass_fraction"][s])
        assert math.isfinite(data["mantle_oxides_wt"]["SiO2"][s])
        assert math.isfinite(data["core_wt"]["Fe"][s])
        assert math.isfinite(data["molar_ratios"]["Mg#_mantle"][s])
        assert math.isfinite(data["heat_production"]["total_w"][s])
    c = data["core_mass_fraction"]
    assert c["p2.5"] <= c["p16"] <= c["median"] <= c["p84"] <= c["p97.5"]
    assert data["devolatilisation"]["label"] == "Earth-calibrated (BSE_MS95 vs CI)"
    draws = pd.read_csv(out / "planet_draws.csv")
    assert len(draws) == 200
    assert {"core_mass_fraction", "mantle_SiO2_wt", "core_Fe_wt"} <= set(draws.columns)
    assert np.median(draws["core_mass_fraction"]) == pytest.approx(c["median"], rel=1e-6)
    oxides = draws[[c for c in draws.columns if c.startswith("mantle_") and c.endswith("_wt")]]
    trace = draws[[c for c in draws.columns if c.startswith("mantle_") and c.endswith("_ppm")]]
    total = oxides.sum(axis=1) + trace.sum(axis=1) / 1e4
    assert np.all(total < 100.0 + 1e-6) and np.all(total > 99.0)


def test_star_command_bad_input_exits_2(tmp_path, capsys):
    bad = tmp_path / "bad.csv"
    bad.write_text("element,value,uncertainty\nFe,0.1,\n")
    assert main(["star", str(bad), "--out", str(tmp_path / "o")]) == 2
    assert "missing uncertainty" in capsys.readouterr().err
    assert main(["star", TEMPLATE, "--out", str(tmp_path / "o"), "--draws", "0"]) == 2
    assert main(["star", TEMPLATE, "--out", str(tmp_path / "o"), "--solar", "nope"]) == 2


def test_a_star_too_poor_in_iron_is_infeasible(tmp_path, capsys):
    # With an Earth-like mantle FeO of 8 wt%, a star with [Fe/H] = -1.3 at solar Mg and
    # Si cannot form a core: every draw is infeasible and the command says so (exit 3).
    t = tmp_path / "poor.csv"
    t.write_text("element,value,uncertainty\nFe,-1.3,0.05\nMg,0,0.05\nSi,0,0.05\n")
    assert main(["star", str(t), "--out", str(tmp_path / "o"), "--draws", "50"]) == 3
    assert "needs more iron" in capsys.readouterr().out
    data = json.loads((tmp_path / "o" / "planet.json").read_text())
    assert data["core_mass_fraction"]["median"] is None
    assert data["flags"]["infeasible_draw_fraction"] == 1.0


def test_fit_handoff_collapses_and_matches_the_fit(bse_case, tmp_path):
    # The same writer for a convex fit: one point, every statistic equal to the value,
    # and the CMF equal to the fit's own.
    from inversion.case import load_case
    from inversion.fit import fit_problem
    from inversion.handoff import fit_handoff
    from inversion.model import compile_problem

    p = compile_problem(load_case(bse_case))
    res = fit_problem(p)
    data = fit_handoff(tmp_path, p, res, planet_mass_kg=5.972e24)
    cmf = data["core_mass_fraction"]
    assert all(cmf[s] == pytest.approx(res.core_mass_fraction, rel=1e-12) for s in STATS)
    # McDonough & Sun (1995) mantle FeO 8.05 wt% sets the split; the final mantle also
    # holds the late-accreted CI (~0.65 % of the mantle, its iron counted as FeO: +~0.15)
    assert data["mantle_oxides_wt"]["FeO"]["median"] == pytest.approx(8.05, abs=0.25)
    assert data["heat_production"]["total_w"]["median"] > 0
    assert len(pd.read_csv(tmp_path / "planet_draws.csv")) == 1
