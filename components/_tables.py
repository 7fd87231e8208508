"""Reading and validating composition tables: the one door for concentration input.

Both the built-in library and a user's own files pass through :func:`check_composition_frame`,
so the same rules (known element, one row per element, non-negative numbers, a known unit)
hold everywhere, and every failure names the file, the row and the field.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd

from .exceptions import InputError
from .units import normalise_unit, oxide_to_element_factor, parse_species, to_mass_fraction_factor

__all__ = ["read_header", "read_csv_checked", "check_composition_frame", "ParsedComposition"]

# Row numbers in messages count the header line as row 1 and data from row 2, as a
# spreadsheet shows them (comment lines are not counted).
_FIRST_DATA_ROW = 2


def read_header(path: Path) -> dict[str, str]:
    """Return the ``# key: value`` metadata lines at the top of a CSV file."""
    meta: dict[str, str] = {}
    with open(path, encoding="utf-8") as fh:
        for line in fh:
            if not line.startswith("#"):
                break
            body = line[1:].strip()
            if ":" in body:
                key, value = body.split(":", 1)
                meta[key.strip()] = value.strip()
    return meta


def read_csv_checked(path: str | Path, required: list[str], *, what: str) -> pd.DataFrame:
    """Read a CSV file (``#`` comment lines allowed) and check its columns.

    Parameters
    ----------
    path : str or Path
        The file.
    required : list of str
        Columns that must be present.
    what : str
        What the file should hold, used in messages.
    """
    path = Path(path)
    if not path.exists():
        raise InputError(f"{what} file not found; check the path", file=str(path))
    if path.stat().st_size == 0:
        raise InputError(f"{what} file is empty", file=str(path))
    try:
        df = pd.read_csv(path, comment="#", dtype=str, keep_default_na=False,
                         skipinitialspace=True)
    except pd.errors.EmptyDataError as err:
        raise InputError(f"{what} file has no header or data", file=str(path)) from err
    except (pd.errors.ParserError, UnicodeDecodeError) as err:
        raise InputError(f"{what} file is not valid CSV: {err}", file=str(path)) from err
    df.columns = [str(c).strip() for c in df.columns]
    missing = [c for c in required if c not in df.columns]
    if missing:
        raise InputError(
            f"{what} file lacks column(s) {missing}; expected columns {required}",
            file=str(path), row=1,
        )
    if len(df) == 0:
        raise InputError(f"{what} file has a header but no data rows", file=str(path))
    return df


def _number(text: str, *, file: str, row: int, field: str, allow_empty: bool) -> float:
    text = text.strip() if isinstance(text, str) else text
    if text == "" or text is None:
        if allow_empty:
            return math.nan
        raise InputError("value is missing", file=file, row=row, field=field)
    try:
        value = float(text)
    except (TypeError, ValueError) as err:
        raise InputError("not a number", file=file, row=row, field=field, value=text) from err
    if not math.isfinite(value):
        raise InputError("not a finite number", file=file, row=row, field=field, value=text)
    if value < 0:
        raise InputError("negative values are not allowed", file=file, row=row, field=field,
                         value=text)
    return value


class ParsedComposition:
    """Element-basis mass fractions parsed from a table (internal carrier)."""

    def __init__(self, composition: pd.Series, uncertainty: pd.Series, sources: pd.Series,
                 recalled: pd.Series, units: pd.Series) -> None:
        self.composition = composition
        self.uncertainty = uncertainty
        self.sources = sources
        self.recalled = recalled
        self.units = units


def check_composition_frame(
    df: pd.DataFrame,
    *,
    file: str,
    allow_oxides: bool = False,
    default_source: str = "",
) -> ParsedComposition:
    """Validate a composition table and convert it to element mass fractions.

    Parameters
    ----------
    df : DataFrame
        Columns ``element``, ``value``, ``unit`` and optionally ``uncertainty`` (same
        unit, 1-sigma) or ``uncertainty_pct`` (1-sigma, percent of value), ``source``,
        ``recalled``. All cells as strings (as read by :func:`read_csv_checked`).
    file : str
        Name of the file, for messages.
    allow_oxides : bool
        Accept oxide names (``SiO2``) with unit wt%: converted to the element.
    default_source : str
        Source key for rows without a ``source`` cell.

    Returns
    -------
    ParsedComposition
        Mass fractions (kg/kg) indexed by element symbol.
    """
    elements: list[str] = []
    values: list[float] = []
    uncs: list[float] = []
    srcs: list[str] = []
    recs: list[bool] = []
    units: list[str] = []
    seen: dict[str, int] = {}
    has_unc = "uncertainty" in df.columns
    has_pct = "uncertainty_pct" in df.columns
    for i, rec in enumerate(df.to_dict("records")):
        row = i + _FIRST_DATA_ROW
        name = str(rec.get("element", "")).strip()
        species = parse_species(name)
        if species is None:
            raise InputError(
                "unknown element symbol" + (" or oxide" if allow_oxides else "")
                + "; use symbols such as Mg, Fe, Ir" + (" or oxides such as MgO" if allow_oxides
                                                        else ""),
                file=file, row=row, field="element", value=name,
            )
        el, n_cat, n_ox = species
        if n_ox and not allow_oxides:
            raise InputError("oxides are not accepted here; give the element concentration",
                             file=file, row=row, field="element", value=name)
        unit_raw = str(rec.get("unit", "")).strip()
        unit = normalise_unit(unit_raw)
        if unit is None or unit == "mass_fraction" and unit_raw == "":
            raise InputError("unknown unit; use wt%, ppm (µg/g) or ppb (ng/g)", file=file,
                             row=row, field="unit", value=unit_raw)
        if n_ox and unit != "wt%":
            raise InputError("oxide concentrations must be given in wt%", file=file, row=row,
                             field="unit", value=unit_raw)
        factor = to_mass_fraction_factor(unit)
        if n_ox:
            factor *= oxide_to_element_factor(el, n_cat, n_ox)
        value = _number(rec.get("value", ""), file=file, row=row, field="value",
                        allow_empty=False)
        unc = math.nan
        if has_unc:
            unc = _number(rec.get("uncertainty", ""), file=file, row=row, field="uncertainty",
                          allow_empty=True)
        if has_pct and math.isnan(unc):
            pct = _number(rec.get("uncertainty_pct", ""), file=file, row=row,
                          field="uncertainty_pct", allow_empty=True)
            unc = value * pct / 100.0
        if el in seen:
            raise InputError(
                f"element {el} appears twice (first at row {seen[el]}); keep one row per element",
                file=file, row=row, field="element", value=name,
            )
        seen[el] = row
        elements.append(el)
        values.append(value * factor)
        uncs.append(unc * factor)
        srcs.append(str(rec.get("source", "")).strip() or default_source)
        recs.append(str(rec.get("recalled", "")).strip().lower() in ("yes", "true", "1"))
        units.append(unit)
    idx = pd.Index(elements, name="element")
    return ParsedComposition(
        composition=pd.Series(np.array(values, dtype=float), index=idx, name="mass_fraction"),
        uncertainty=pd.Series(np.array(uncs, dtype=float), index=idx, name="uncertainty"),
        sources=pd.Series(srcs, index=idx, name="source", dtype=object),
        recalled=pd.Series(recs, index=idx, name="recalled", dtype=bool),
        units=pd.Series(units, index=idx, name="unit", dtype=object),
    )
