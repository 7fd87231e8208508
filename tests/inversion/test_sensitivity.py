"""``planetmix sensitivity``: the Earth case over the library's alternative tables.

Kept cheap: the Earth case (bulk silicate Earth of McDonough & Sun 1995, Mg reference,
15% default uncertainty, CI late component) with two candidates, CI and EH, varying the CI
compilation and the bulk silicate Earth only. The full case runs in the same way
(``planetmix sensitivity case_studies/earth/case.toml --out DIR``; see the report).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from inversion.case import load_case
from inversion.cli import main
from inversion.sensitivity import TABLES, variants

EARTH = Path("case_studies/earth/case.toml").resolve()


def _small_earth(tmp_path: Path) -> Path:
    text = EARTH.read_text()
    text = text.replace('table = "bse_mcdonough1995.csv"',
                        f'table = "{(EARTH.parent / "bse_mcdonough1995.csv").as_posix()}"')
    text = text.replace('candidates = ["CI", "CM", "CV", "H", "L", "EH"]',
                        'candidates = ["CI", "EH"]')
    assert 'candidates = ["CI", "EH"]' in text
    path = tmp_path / "case.toml"
    path.write_text(text)
    return path


def test_variants_of_the_earth_case_name_every_table():
    vs = variants(load_case(EARTH))
    names = [v.name for v in vs]
    assert names[0] == "baseline"
    assert "CI=CI_PO14" in names and "BSE=BSE_PO14" in names
    assert {v.table for v in vs} == {"baseline", *TABLES}
    ci = next(v for v in vs if v.table == "CI")
    assert "CI_PO14" in [c.name for c in ci.case.candidates]
    assert ci.case.late_component.name == "CI_PO14"
    bse = next(v for v in vs if v.table == "BSE")
    assert bse.case.target.path.endswith("pm_palme2014.csv")
    # rows without an uncertainty get the case's default (15% in the Earth case)
    t = bse.case.target
    rel = (t.uncertainty / t.composition)[list(t.uncertainty_defaulted)]
    assert np.allclose(rel, 0.15)


def test_sensitivity_command_on_the_earth_case(tmp_path, capsys):
    case = _small_earth(tmp_path)
    out = tmp_path / "sens"
    code = main(["sensitivity", str(case), "--out", str(out), "--vary", "CI", "BSE"])
    assert code == 0
    summary = json.loads((out / "summary.json").read_text())
    runs = {r["variant"]: r for r in summary["runs"]}
    assert set(runs) == {"baseline", "CI=CI_PO14", "BSE=BSE_PO14"}
    for r in runs.values():
        assert r["status"].startswith("optimal"), r
        # R-basis weights on the simplex; the alternative CI is reported as CI
        assert r["w_EH"] + r["w_CI"] == pytest.approx(1.0, abs=1e-6)
        assert "w_CI_PO14" not in r
    # the spread of each conclusion is reported
    spread = {s["quantity"]: s for s in summary["spread"]}
    for q in ("w_EH", "T0", "late_accretion_fraction", "core_mass_fraction"):
        assert spread[q]["min"] <= spread[q]["baseline"] <= spread[q]["max"], q
    # a different target: the element count and chi2 move; BSE_PO14 holds fewer elements
    assert runs["BSE=BSE_PO14"]["n_elements"] != runs["baseline"]["n_elements"]
    assert "provenance" in summary and summary["provenance"]
    assert (out / "sensitivity.csv").exists() and (out / "sensitivity.png").exists()
    printed = capsys.readouterr().out
    assert "CI=CI_PO14" in printed and "BSE=BSE_PO14" in printed
