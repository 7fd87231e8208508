"""``planetmix sensitivity``: the Earth case over the library's alternative tables.

Kept cheap: the Earth case (bulk silicate Earth of McDonough & Sun 1995, Mg reference,
15% default uncertainty, CI late component) with a reduced candidate set, CI and EH
(instead of the case's six), varying the CI compilation and the bulk silicate Earth only.
The full case runs in the same way (``planetmix sensitivity case_studies/earth/case.toml
--out DIR``; see the case study's README).
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from inversion.case import load_case
from inversion.cli import main
from inversion.report import detect_kind
from inversion.sensitivity import TABLES, categorical_spread, spread_table, variants

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
    # every conclusion of the issue is in each run: best hypothesis, class test
    for r in runs.values():
        assert r["best_hypothesis"] and set(r["best_hypothesis"].split(" + ")) <= {"CI", "EH"}
        assert r["class_test"] == "done" and r["class_test_sigma"] >= 0.0
    assert "class_test_sigma" in spread and "slope" in spread
    words = {w["quantity"]: w for w in summary["spread_words"]}
    assert {"best hypothesis", "dominant block", "class test"} <= set(words)
    offs = [w for q, w in words.items() if q.startswith("off trend: ")]
    assert offs and all(w["n_runs"] == 3 for w in offs)
    # the report page: written by the command, self-contained, carries the figure
    page = (out / "report.html").read_text()
    assert "sensitivity to the reference tables" in page
    assert page.count("<img") == 1 and "src='data:image/png;base64," in page
    assert "Spread of the conclusions over the tables" in page
    for name in ("CI=CI_PO14", "BSE=BSE_PO14", "best hypothesis", "class test"):
        assert name in page, name
    assert not re.search(r"(src|href)=['\"]?(https?:)?//", page)
    assert "http://" not in page and "https://" not in page


def test_report_command_recognises_a_sensitivity_folder(tmp_path):
    """``planetmix report`` rebuilds the page from the folder's tables alone."""
    out = tmp_path / "sens"
    out.mkdir()
    runs = pd.DataFrame([
        {"variant": "baseline", "table": "baseline", "choice": "as given", "status": "optimal",
         "n_elements": 40, "chi2": 50.0, "w_CI": 0.2, "w_EH": 0.8, "dominant": "EH",
         "best_hypothesis": "EH + CI", "T0": 1380.0, "slope": 0.002,
         "late_accretion_fraction": 0.005, "core_mass_fraction": 0.33, "off_trend": "Zn Bi",
         "class_test": "done", "class_test_sigma": 1.0, "class_test_difference": 0.1,
         "class_test_differ": False, "reason": "", "changed": ""},
        {"variant": "BSE=X", "table": "BSE", "choice": "X", "status": "optimal",
         "n_elements": 38, "chi2": 40.0, "w_CI": 0.0, "w_EH": 1.0, "dominant": "EH",
         "best_hypothesis": "EH", "T0": 1400.0, "slope": 0.003,
         "late_accretion_fraction": 0.006, "core_mass_fraction": 0.35, "off_trend": "Zn",
         "class_test": "done", "class_test_sigma": 3.5, "class_test_difference": 0.4,
         "class_test_differ": True, "reason": "", "changed": "best hypothesis"},
        {"variant": "Tc=Y", "table": "Tc", "choice": "Y", "status": "not applicable",
         "reason": "no Fe"}])
    runs.to_csv(out / "sensitivity.csv", index=False)
    spread_table(runs).to_csv(out / "spread.csv")
    assert detect_kind(out) == "sensitivity"
    assert main(["report", str(out)]) == 0
    page = (out / "report.html").read_text()
    assert "not applicable: Tc=Y" in page and "no Fe" in page
    assert "src='data:image/png;base64," in page
    words = categorical_spread(runs).set_index("quantity")
    assert words.loc["best hypothesis", "n_differ"] == 1
    assert words.loc["class test", "values"] == "one trend | classes differ"
    assert words.loc["off trend: Bi", "differ_in"] == "BSE=X"
    assert words.loc["off trend: Zn", "n_differ"] == 0
