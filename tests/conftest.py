"""Shared fixtures: synthetic bodies written as real case files."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import components

# Elements with anomalous behaviour in the Earth's mantle (volatile chalcophiles,
# halogens): kept out of fits of natural targets (common practice).
EARTH_EXCLUDE = ["S", "Se", "Te", "Pb", "In", "Cl", "Br", "I", "Tl", "Hg", "Cd", "B"]


def write_target(path: Path, composition: pd.Series, rel_unc: float | pd.Series) -> Path:
    """Write a target table (ppm, uncertainty_pct) from mass fractions."""
    comp = composition[composition > 0]
    pct = (rel_unc * 100.0) if np.isscalar(rel_unc) else (rel_unc[comp.index] * 100.0)
    df = pd.DataFrame({"element": comp.index, "value": comp.to_numpy() * 1e6, "unit": "ppm",
                       "uncertainty_pct": np.broadcast_to(pct, comp.shape)})
    df.to_csv(path, index=False)
    return path


def write_case(folder: Path, *, target: str = "target.csv", candidates: list[str],
               extra: str = "", late: str = "CI", exclude: list[str] | None = None,
               form: str = "kinked", title: str = "test case") -> Path:
    """Write a TOML case file beside ``target``."""
    excl = ", ".join(f'"{e}"' for e in (exclude or []))
    cands = ", ".join(f'"{c}"' for c in candidates)
    text = f'''title = "{title}"
[target]
table = "{target}"
planet_mass_kg = 5.97e24
[building_blocks]
candidates = [{cands}]
[volatility]
form = "{form}"
[late_accretion]
component = "{late}"
[elements]
exclude = [{excl}]
{extra}
'''
    path = folder / "case.toml"
    path.write_text(text)
    return path


@pytest.fixture
def bse_case(tmp_path: Path) -> Path:
    """McDonough & Sun (1995) bulk silicate Earth against CI, CI late veneer."""
    bse = components.load("BSE_MS95")
    rel = (bse.uncertainty / bse.composition).fillna(0.15)
    write_target(tmp_path / "target.csv", bse.composition, rel)
    return write_case(tmp_path, candidates=["CI"], exclude=EARTH_EXCLUDE, title="BSE vs CI")
