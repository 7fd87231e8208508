"""Result folders shared by the report tests and the browser tests (computed once)."""

from __future__ import annotations

from pathlib import Path

import pytest

import components
from inversion.cli import main
from tests.conftest import EARTH_EXCLUDE, write_case, write_target

REPO = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="session")
def shared_results(tmp_path_factory) -> dict[str, Path]:
    """A fit and a rank folder of the McDonough & Sun (1995) BSE against CI and H, and a
    star and a batch folder of the data templates."""
    base = tmp_path_factory.mktemp("results")
    bse = components.load("BSE_MS95")
    rel = (bse.uncertainty / bse.composition).fillna(0.15)
    write_target(base / "target.csv", bse.composition, rel)
    case = write_case(base, candidates=["CI", "H"], exclude=EARTH_EXCLUDE,
                      title="BSE vs CI+H (report test)")
    assert main(["fit", str(case), "--out", str(base / "fit")]) == 0
    assert main(["rank", str(case), "--out", str(base / "rank"), "--workers", "1"]) == 0
    tpl = REPO / "data_templates"
    assert main(["star", str(tpl / "star_abundances.csv"), "--out", str(base / "star"),
                 "--draws", "200"]) == 0
    assert main(["batch", str(tpl / "catalog.csv"), "--out", str(base / "batch"),
                 "--draws", "50", "--workers", "1"]) == 0
    return {"fit": base / "fit", "rank": base / "rank", "star": base / "star",
            "batch": base / "batch", "base": base}
