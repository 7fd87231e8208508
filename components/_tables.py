"""Reading and validating composition tables: the one door for concentration input.

Both the built-in library and a user's own files pass through :func:`check_composition_frame`,
so the same rules (known element, one row per element, non-negative numbers, a known unit)
hold everywhere, and every failure names the file, the row and the field.
"""

from __future__ import annotations

import csv
import math
import os
import re
import stat
from pathlib import Path

import numpy as np
import pandas as pd

from .exceptions import InputError
from .units import (
    MAX_INPUT_BYTES,
    PLAUSIBLE,
    normalise_unit,
    oxide_to_element_factor,
    parse_species,
    to_mass_fraction_factor,
)

__all__ = ["read_header", "read_csv_checked", "read_csv_rows", "read_text_checked",
           "parse_decimal",
           "check_composition_frame", "ParsedComposition", "CsvRows"]

# Row numbers in messages count the header line as row 1 and data from row 2, as a
# spreadsheet shows them (comment lines are not counted).
_FIRST_DATA_ROW = 2


def read_text_checked(path: str | Path, *, what: str,
                      max_bytes: int = MAX_INPUT_BYTES) -> str:
    """Read an input file as text: the one door every input file goes through.

    Refused before reading: a missing path, a folder, anything that is not a regular
    file (a FIFO, a device, a socket), a name the system cannot open (too long, a NUL
    byte) and a file larger than ``max_bytes`` (:data:`components.units.MAX_INPUT_BYTES`).
    The bytes must be UTF-8, with or without a byte-order mark.

    Parameters
    ----------
    path : str or Path
        The file.
    what : str
        What the file should hold, used in messages.
    max_bytes : int
        Size limit.

    Returns
    -------
    str
        The text, without a byte-order mark.
    """
    if not isinstance(path, str | os.PathLike):
        raise InputError(f"the {what} file must be given as a path", value=path)
    file = str(path)
    try:
        st = os.stat(path)
    except FileNotFoundError:
        raise InputError(f"{what} file not found; check the path", file=file) from None
    except (OSError, ValueError) as err:
        why = getattr(err, "strerror", None) or str(err)
        raise InputError(f"{what} file cannot be opened ({why}); check the path",
                         file=file) from None
    if stat.S_ISDIR(st.st_mode):
        raise InputError(f"is a folder; give the path of the {what} file", file=file)
    if not stat.S_ISREG(st.st_mode):
        raise InputError(f"is not a regular file (a FIFO, device or socket); give the path "
                         f"of the {what} file", file=file)
    if st.st_size > max_bytes:
        raise InputError(f"{what} file is larger than the limit of {max_bytes} bytes; "
                         "is it the right file?", file=file, value=st.st_size)
    try:
        with open(path, "rb") as fh:
            data = fh.read(max_bytes + 1)
    except OSError as err:
        raise InputError(f"{what} file cannot be read ({err.strerror})", file=file) from None
    if len(data) > max_bytes:
        raise InputError(f"{what} file is larger than the limit of {max_bytes} bytes",
                         file=file)
    if data.startswith((b"\xff\xfe", b"\xfe\xff")):
        raise InputError(f"{what} file is UTF-16 text; save it as UTF-8", file=file)
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        raise InputError(f"{what} file is not UTF-8 text (byte 0x{data[err.start]:02x} at "
                         f"offset {err.start}); save it as UTF-8", file=file) from None
    if "\x00" in text:
        raise InputError(f"{what} file holds NUL characters (binary data?); give a text file",
                         file=file)
    return text


def read_header(path: str | Path, *, unique: tuple[str, ...] = ()) -> dict[str, str]:
    """Return the ``# key: value`` metadata lines at the top of a CSV file.

    Blank lines among them are skipped; the first other line ends the header.

    Parameters
    ----------
    path : str or Path
        The CSV file.
    unique : tuple of str
        Keys that may appear once only (``name``, an isotope anomaly...): a second line
        with such a key is an error, since silently keeping one of the two values would
        hide which one is used.
    """
    meta: dict[str, str] = {}
    seen: dict[str, int] = {}
    for n, line in enumerate(read_text_checked(path, what="CSV").splitlines(), start=1):
        if not line.strip():
            continue
        if not line.startswith("#"):
            break
        body = line[1:].strip()
        if ":" in body:
            key, value = body.split(":", 1)
            key = key.strip()
            if key in unique and key in seen:
                raise InputError(f"the header line '# {key}:' appears twice (lines "
                                 f"{seen[key]} and {n}); keep one", file=str(path),
                                 field=key, value=value.strip())
            seen.setdefault(key, n)
            meta[key] = value.strip()
    return meta


class CsvRows:
    """A CSV file split into its header and data rows, with each row's field count.

    ``rows[i]`` is the list of fields of data row ``i`` (row ``i + 2`` in messages),
    padded with ``""`` or cut to the header's length; ``widths[i]`` is the number of
    fields the row really had.
    """

    def __init__(self, header: list[str], rows: list[list[str]], widths: list[int]) -> None:
        self.header = header
        self.rows = rows
        self.widths = widths

    def frame(self) -> pd.DataFrame:
        """The rows as a DataFrame of strings."""
        return pd.DataFrame(self.rows, columns=self.header, dtype=object).astype(str)


def read_csv_rows(path: str | Path, *, what: str) -> CsvRows:
    """Read a CSV file (``#`` comment lines and blank lines allowed) into rows.

    Parameters
    ----------
    path : str or Path
        The file.
    what : str
        What the file should hold, used in messages.
    """
    file = str(path)
    text = read_text_checked(path, what=what)
    lines = [ln for ln in text.splitlines()
             if ln.strip() and not ln.lstrip().startswith("#")]
    if not lines:
        raise InputError(f"{what} file has no header or data", file=file)
    try:
        parsed = list(csv.reader(lines, skipinitialspace=True, strict=True))
    except csv.Error as err:
        raise InputError(f"{what} file is not valid CSV: {err}", file=file) from None
    header = [h.strip() for h in parsed[0]]
    if any(h == "" for h in header):
        raise InputError(f"{what} file has an empty column name in its header", file=file,
                         row=1, value=",".join(header))
    dup = sorted({h for h in header if header.count(h) > 1})
    if dup:
        raise InputError(f"{what} file names column(s) {dup} twice", file=file, row=1)
    n = len(header)
    rows, widths = [], []
    for fields in parsed[1:]:
        fields = [f.strip() for f in fields]
        if not any(fields):
            continue  # a line of separators only
        widths.append(len(fields))
        rows.append((fields + [""] * n)[:n])
    return CsvRows(header, rows, widths)


def read_csv_checked(path: str | Path, required: list[str], *, what: str) -> pd.DataFrame:
    """Read a CSV file (``#`` comment lines allowed) and check its columns.

    Every data row must have as many fields as the header (a short or long row is an
    error naming the row).

    Parameters
    ----------
    path : str or Path
        The file.
    required : list of str
        Columns that must be present.
    what : str
        What the file should hold, used in messages.
    """
    file = str(path)
    if os.path.isfile(path) and os.path.getsize(path) == 0:
        raise InputError(f"{what} file is empty", file=file)
    tab = read_csv_rows(path, what=what)
    missing = [c for c in required if c not in tab.header]
    if missing:
        raise InputError(
            f"{what} file lacks column(s) {missing}; expected columns {required}",
            file=file, row=1,
        )
    if not tab.rows:
        raise InputError(f"{what} file has a header but no data rows", file=file)
    for i, w in enumerate(tab.widths):
        if w != len(tab.header):
            raise InputError(f"the row has {w} fields, the header {len(tab.header)}; "
                             "check for a missing or extra comma", file=file,
                             row=i + _FIRST_DATA_ROW)
    return tab.frame()


#: A number as tables write it: ASCII digits, an optional sign, decimal point and
#: exponent. Python's float() also takes "1_000", full-width digits and "infinity";
#: none of them is a table value, so they are refused rather than read.
_DECIMAL = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?", re.ASCII)
_NON_FINITE = {"nan", "+nan", "-nan", "inf", "+inf", "-inf", "infinity", "+infinity",
               "-infinity"}


def parse_decimal(value: object) -> float:
    """A table cell as a float: a plain decimal number, or nan/inf spelled out.

    Raises
    ------
    ValueError
        For anything else (``1_000``, full-width digits, ``0x10``, ``1,5``...).
    """
    if isinstance(value, bool):
        raise ValueError(f"not a number: {value!r}")
    if isinstance(value, int | float):
        return float(value)
    text = str(value).strip()
    if _DECIMAL.fullmatch(text) or text.lower() in _NON_FINITE:
        return float(text)
    raise ValueError(f"not a number: {value!r}")


def _number(text: str, *, file: str, row: int, field: str, allow_empty: bool) -> float:
    text = text.strip() if isinstance(text, str) else text
    if text == "" or text is None:
        if allow_empty:
            return math.nan
        raise InputError("value is missing", file=file, row=row, field=field)
    try:
        value = parse_decimal(text)
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
    total = 0.0
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
        mf_lim = PLAUSIBLE["mass_fraction"]
        species_mf = value * to_mass_fraction_factor(unit)
        if not mf_lim.contains(species_mf):
            raise InputError(f"the concentration is above 100 wt% ({mf_lim.reason}); check the "
                             "value and its unit", file=file, row=row, field="value",
                             value=rec.get("value"))
        total += species_mf
        unc = math.nan
        if has_unc:
            unc = _number(rec.get("uncertainty", ""), file=file, row=row, field="uncertainty",
                          allow_empty=True)
        if has_pct and math.isnan(unc):
            pct = _number(rec.get("uncertainty_pct", ""), file=file, row=row,
                          field="uncertainty_pct", allow_empty=True)
            unc = value * pct / 100.0
        if math.isfinite(unc) and not mf_lim.contains(unc * to_mass_fraction_factor(unit)):
            raise InputError("the uncertainty is above 100 wt%; check the value and its unit",
                             file=file, row=row, field="uncertainty_pct" if has_pct and not
                             has_unc else "uncertainty", value=unc)
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
    tot_lim = PLAUSIBLE["composition_total"]
    if not tot_lim.contains(total):
        raise InputError(f"the concentrations add up to {100 * total:.4g} wt%: "
                         f"{tot_lim.reason}; check the values and their units", file=file,
                         field="value")
    idx = pd.Index(elements, name="element")
    return ParsedComposition(
        composition=pd.Series(np.array(values, dtype=float), index=idx, name="mass_fraction"),
        uncertainty=pd.Series(np.array(uncs, dtype=float), index=idx, name="uncertainty"),
        sources=pd.Series(srcs, index=idx, name="source", dtype=object),
        recalled=pd.Series(recs, index=idx, name="recalled", dtype=bool),
        units=pd.Series(units, index=idx, name="unit", dtype=object),
    )
