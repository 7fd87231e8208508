"""The Earth and Mars with every isotope system the library holds for them
(case_studies/*/case_isotopes.toml, case_studies/earth/case_staged.toml): the claims of
the two READMEs' isotope sections.

Published readings compared with (from memory): the Earth is isotopically closest to the
enstatite chondrites in every system (Javoy 1995, Geophys. Res. Lett. 22, 2219; Dauphas
2017, Nature 541, 521); Mars lies between the ordinary and the enstatite chondrites
(Sanloup et al. 1999, PEPI 112, 43: 45 % EH + 55 % H from oxygen; Brasser et al. 2018,
GRL 45, 5908, abstract read: 68 % enstatite + 32 % ordinary chondrite by mass). The other
numbers asserted are planetmix's own, measured with the library's recalled group values.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from inversion.case import load_case
from inversion.fit import screen
from inversion.isotopes import feasibility_report
from inversion.model import compile_problem
from inversion.staged import fit_case

ROOT = Path(__file__).resolve().parents[2] / "case_studies"


@pytest.fixture(scope="module")
def earth():
    return compile_problem(load_case(ROOT / "earth" / "case_isotopes.toml"))


@pytest.fixture(scope="module")
def mars():
    return compile_problem(load_case(ROOT / "mars" / "case_isotopes.toml"))


def _report(p, names):
    return feasibility_report(p.subset(names))


def test_earth_oxygen_excludes_carbonaceous_plus_ordinary(earth):
    # README: CI+H and CI+L fail D17O alone (reach +0.39..+0.73 / +1.07 against 0)
    for names, hi in ((["CI", "H"], 0.73), (["CI", "L"], 1.07)):
        rep = _report(earth, names)
        assert not rep.feasible and rep.alone == ("D17O",), (names, rep.messages)
        assert rep.intervals["D17O"] == pytest.approx((0.39, hi), abs=0.01)
    # the enstatite Earth meets every system
    assert _report(earth, ["EH"]).feasible


def test_mars_oxygen_excludes_the_ordinary_only_basin(mars):
    # README: H and L alone fail D17O alone; CI + L fails D17O only jointly
    for name in ("H", "L"):
        rep = _report(mars, [name])
        assert rep.alone == ("D17O",), rep.messages
    rep = _report(mars, ["CI", "L"])
    assert not rep.feasible and not rep.alone
    assert all("D17O" in combo for combo in rep.joint)
    # only ordinary + enstatite (or + CV) can come down to +0.32
    lo, hi = _report(mars, ["L", "EH"]).intervals["D17O"]
    assert lo < 0.32 < hi


def test_earth_staged_one_mixture_preferred():
    """README: the isotopes read one mixture throughout, EH-dominated; two stages are
    not resolved with e64Ni as the only siderophile system."""
    case = load_case(ROOT / "earth" / "case_staged.toml", staged=True)
    st = fit_case(case, core_mass_fraction=0.369)
    assert st["preferred"] == "single" and st["lr_pvalue"] > 0.5
    assert st["single"]["EH"] == pytest.approx(0.72, abs=0.03)
    assert st["bic_staged"] - st["bic_single"] == pytest.approx(2.8, abs=0.1)


@pytest.mark.slow
def test_earth_four_systems_ranking():
    """README: every hypothesis within ΔBIC 6 of the best is about 95 % EH or more (mass
    fractions); CM + H is 10.0 behind EH alone."""
    fits = [f for f in screen(load_case(ROOT / "earth" / "case_isotopes.toml")).fits
            if f.feasible]
    best = min(f.bic for f in fits)
    assert min(fits, key=lambda f: f.bic).components == ("EH",)
    close = [f for f in fits if f.bic - best < 6.0]
    assert len(close) >= 3
    for f in close:
        assert f.mass_fractions["EH"] >= 0.945, (f.components, f.mass_fractions)
    cm_h = next(f for f in fits if f.components == ("CM", "H"))
    assert cm_h.bic - best == pytest.approx(10.0, abs=0.3)


@pytest.mark.slow
def test_mars_three_systems_ranking():
    """README: with Delta17O the best Mars is L 0.32 + EH 0.68, H + EH at ΔBIC 5.3, and
    no hypothesis without EH within ΔBIC 10."""
    result = screen(load_case(ROOT / "mars" / "case_isotopes.toml"))
    ranking = result.table
    ok = ranking[ranking["status"] != "infeasible"]
    assert ok.iloc[0]["components"] == "L+EH"
    # Brasser et al. (2018, GRL 45, 5908; abstract read): 68 % EC + 32 % OC by mass
    l_eh = next(f for f in result.fits if f.components == ("L", "EH"))
    assert l_eh.mass_fractions["EH"] == pytest.approx(0.68, abs=0.01)
    best = ok["bic"].min()
    h_eh = ok[ok["components"] == "H+EH"]["bic"].iloc[0]
    assert h_eh - best == pytest.approx(5.3, abs=0.2)
    no_eh = ok[~ok["components"].str.contains("EH")]
    assert (no_eh["bic"] - best > 10.0).all()
    assert np.isin(["L", "H"], ranking[ranking["status"] == "infeasible"]["components"]).all()
