"""The reference library: building blocks, element properties, solar and isotope tables.

Every table lives as plain CSV in ``components/data`` (formats in ``data/FORMAT.md``);
each value carries its unit, uncertainty and source key, and a source key must exist in
the sources table for the table to load.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cache, lru_cache
from pathlib import Path

import numpy as np
import pandas as pd
import periodictable

from ._tables import check_composition_frame, read_csv_checked, read_header
from .exceptions import InputError
from .units import PLAUSIBLE

__all__ = [
    "Component",
    "available",
    "load",
    "read_component",
    "elements",
    "solar",
    "solar_tables",
    "isotopes",
    "sources",
    "atomic_weight_series",
    "default_relative_uncertainty",
    "PROVENANCE_LEVELS",
    "DATA_DIR",
]

DATA_DIR = Path(__file__).resolve().parent / "data"

COMPONENT_KINDS = ("chondrite", "silicate_reference", "user")
#: Header keys by which a user's component CSV carries its own isotope anomalies
#: (``# e54Cr: 0.12 0.05`` = value and 1-sigma).
ISOTOPE_HEADER_KEYS = ("D17O", "e50Ti", "e54Cr", "e48Ca")

#: How a value was obtained (the ``provenance`` column; FORMAT.md). ``user`` marks the
#: values of a user's own file that gives no provenance.
PROVENANCE_LEVELS = ("publication", "typed_copy", "unattributed_copy", "recalled", "derived",
                     "user")

#: Default relative 1-sigma of a building-block value by cosmochemical class: the typical
#: member-to-member scatter of bulk analyses within a chondrite group (our choice, common
#: practice), in line with the spread between independent compilations this library's
#: tests measure (CI of Lodders 2003 vs Palme, Lodders & Jones 2014: refractory and major
#: elements within 10%, volatile elements within 25%).
DEFAULT_REL_SIGMA_CLASS = {"main_component": 0.05, "refractory": 0.08,
                           "moderately_volatile": 0.15, "highly_volatile": 0.25}
#: Added in quadrature, by provenance level: transcription risk (typed and unattributed
#: copies), memory (recalled) and the model error of a derived value (derived: the groups'
#: measured REE over their CI-scaled estimates scatter by about 20%, 0.81 in EL to 1.17 in
#: CK, measured in tests/components/test_group_tables.py).
DEFAULT_REL_SIGMA_PROVENANCE = {"publication": 0.0, "typed_copy": 0.02,
                                "unattributed_copy": 0.05, "recalled": 0.10,
                                "derived": 0.20, "user": 0.05}


def default_relative_uncertainty(element: str, provenance: str) -> float:
    """Default relative 1-sigma of a building-block value without a stated uncertainty.

    ``hypot(class term, provenance term)`` with the terms of
    :data:`DEFAULT_REL_SIGMA_CLASS` and :data:`DEFAULT_REL_SIGMA_PROVENANCE`.

    Examples
    --------
    >>> round(default_relative_uncertainty("Al", "derived"), 3)
    0.215
    """
    cls = elements()["cosmochemical_class"].get(element, "highly_volatile")
    if element == "O":  # condenses at 180 K as ice, but the anion of every rock: a major
        cls = "main_component"
    base = DEFAULT_REL_SIGMA_CLASS.get(cls, DEFAULT_REL_SIGMA_CLASS["highly_volatile"])
    if provenance not in DEFAULT_REL_SIGMA_PROVENANCE:
        raise InputError(f"unknown provenance level; use one of {list(PROVENANCE_LEVELS)}",
                         field="provenance", value=provenance)
    return float(np.hypot(base, DEFAULT_REL_SIGMA_PROVENANCE[provenance]))


@dataclass(frozen=True)
class Component:
    """A composition with its provenance.

    Attributes
    ----------
    name : str
        Library name (``CI``, ``EH``, ``BSE_MS95``...) or the user's name.
    kind : str
        ``chondrite``, ``silicate_reference`` or ``user``.
    description : str
        One line saying what it is.
    composition : pandas.Series
        Mass fractions (kg/kg) indexed by element symbol.
    uncertainty : pandas.Series
        1-sigma mass fractions, NaN where the source gives none.
    sources : pandas.Series
        Source key per element (see :func:`sources`).
    recalled : pandas.Series
        True where the value was typed from memory of the publication (provenance
        ``recalled``).
    path : str
        File the component was read from.
    provenance : pandas.Series
        How each value was obtained, one of :data:`PROVENANCE_LEVELS`.
    uncertainty_basis : pandas.Series
        ``source`` (the uncertainty is the source's), ``default`` (the documented default
        by element class and provenance level), ``spread`` (the default and the difference
        between two copies of the value, in quadrature) or empty (none given).
    """

    name: str
    kind: str
    description: str
    composition: pd.Series
    uncertainty: pd.Series
    sources: pd.Series
    recalled: pd.Series
    path: str = ""
    source_keys: tuple[str, ...] = field(default=())
    isotopes: dict[str, tuple[float, float]] = field(default_factory=dict)
    provenance: pd.Series = field(default_factory=lambda: pd.Series(dtype=object))
    uncertainty_basis: pd.Series = field(default_factory=lambda: pd.Series(dtype=object))

    def provenance_counts(self) -> dict[str, int]:
        """Number of values at each provenance level (levels with none left out)."""
        counts = self.provenance.value_counts()
        return {lv: int(counts[lv]) for lv in PROVENANCE_LEVELS if lv in counts.index}

    def relative_uncertainty(self) -> pd.Series:
        """Relative 1-sigma of every value: the stored one, else the documented default
        (:func:`default_relative_uncertainty`) for the value's provenance level."""
        rel = self.uncertainty / self.composition
        prov = self.provenance.reindex(self.composition.index).fillna("user")
        for el in rel.index[~np.isfinite(rel.to_numpy(float))]:
            rel[el] = default_relative_uncertainty(el, str(prov[el]))
        return rel

    def ratio_to(self, reference: str) -> pd.Series:
        """Mass ratios C_i / C_ref of every element.

        Examples
        --------
        >>> ci = load("CI")
        >>> float(ci.ratio_to("Mg")["Mg"])
        1.0
        """
        if reference not in self.composition.index:
            raise InputError(f"component {self.name} has no {reference}; choose another "
                             "reference element", field="reference_element", value=reference)
        return self.composition / self.composition[reference]

    def to_dataframe(self) -> pd.DataFrame:
        """Tidy view: one row per element with value, uncertainty, basis, source, provenance."""
        return pd.DataFrame({
            "mass_fraction": self.composition,
            "uncertainty": self.uncertainty,
            "uncertainty_basis": self.uncertainty_basis.reindex(self.composition.index),
            "source": self.sources,
            "provenance": self.provenance.reindex(self.composition.index),
        })


@lru_cache(maxsize=1)
def sources() -> pd.DataFrame:
    """All citations, indexed by source key (columns ``citation``, ``doi``)."""
    frames = []
    for path in sorted((DATA_DIR / "sources").glob("*.csv")):
        df = read_csv_checked(path, ["key", "citation"], what="sources")
        df["file"] = path.name
        frames.append(df)
    if not frames:
        return pd.DataFrame(columns=["citation", "doi", "file"]).rename_axis("key")
    table = pd.concat(frames, ignore_index=True)
    dup = table["key"][table["key"].duplicated()]
    if len(dup):
        raise InputError(f"source key defined twice: {sorted(set(dup))}",
                         file=str(DATA_DIR / "sources"), field="key")
    if "doi" not in table.columns:
        table["doi"] = ""
    return table.set_index("key")[["citation", "doi", "file"]]


def _check_sources(keys: pd.Series, file: str) -> None:
    known = sources().index
    for i, key in enumerate(keys):
        for k in str(key).split(";"):
            k = k.strip()
            if k and k not in known:
                raise InputError("source key not in the sources table; add it to "
                                 "components/data/sources/", file=file, row=i + 2,
                                 field="source", value=k)
            if not k:
                raise InputError("every value needs a source key", file=file, row=i + 2,
                                 field="source")


def _component_from_file(path: Path, *, require_sources: bool, name: str | None = None,
                         kind: str | None = None) -> Component:
    meta = read_header(path, unique=("name", "kind", "description", "source",
                                     *ISOTOPE_HEADER_KEYS))
    df = read_csv_checked(path, ["element", "value", "unit"], what="component")
    file = str(path)
    parsed = check_composition_frame(df, file=file, allow_oxides=not require_sources,
                                     default_source=meta.get("source", ""))
    if require_sources:
        _check_sources(parsed.sources, file)
    kind = kind or meta.get("kind", "user")
    if kind not in COMPONENT_KINDS:
        raise InputError(f"unknown component kind; use one of {list(COMPONENT_KINDS)}",
                         file=file, field="kind", value=kind)
    prov, basis = _provenance_columns(df, parsed, file=file, require=require_sources)
    keys = tuple(sorted({k.strip() for s in parsed.sources for k in str(s).split(";")
                         if k.strip()}))
    iso: dict[str, tuple[float, float]] = {}
    for q in ISOTOPE_HEADER_KEYS:
        if q in meta:
            parts = meta[q].replace(",", " ").split()
            try:
                value, sigma = (float(x) for x in parts)
            except ValueError as err:
                raise InputError(f"give '# {q}: value 1-sigma' (two numbers)", file=file,
                                 field=q, value=meta[q]) from err
            # the same declared ranges for the library's files and a user's
            for v, key, what in ((value, "isotope_value", "anomaly"),
                                 (sigma, "isotope_sigma", "1-sigma")):
                lim = PLAUSIBLE[key]
                if not lim.contains(v):
                    raise InputError(f"the {what} lies outside {lim.describe()}: "
                                     f"{lim.reason}", file=file, field=q, value=v)
            iso[q] = (value, sigma)
    return Component(
        name=name or meta.get("name") or path.stem,
        kind=kind,
        description=meta.get("description", ""),
        composition=parsed.composition,
        uncertainty=parsed.uncertainty,
        sources=parsed.sources,
        recalled=prov == "recalled",
        path=file,
        source_keys=keys,
        isotopes=iso,
        provenance=prov,
        uncertainty_basis=basis,
    )


def _provenance_columns(df: pd.DataFrame, parsed, *, file: str, require: bool
                        ) -> tuple[pd.Series, pd.Series]:
    """Provenance level and uncertainty basis per element, checked.

    Library files must give ``provenance`` on every row (a ``derived`` row names its rule
    as a source key starting with ``derived``); a user's file may omit the column: its
    values are then ``recalled`` where flagged so, else ``user``.
    """
    idx = parsed.composition.index
    if "provenance" in df.columns:
        prov = [str(v).strip() for v in df["provenance"]]
    elif require:
        raise InputError("library tables need a 'provenance' column (FORMAT.md)", file=file,
                         field="provenance")
    else:
        prov = ["recalled" if r else "user" for r in parsed.recalled]
    for i, (lv, src) in enumerate(zip(prov, parsed.sources, strict=True)):
        if lv not in PROVENANCE_LEVELS:
            raise InputError(f"unknown provenance level; use one of {list(PROVENANCE_LEVELS)}",
                             file=file, row=i + 2, field="provenance", value=lv)
        if lv == "derived" and not str(src).strip().startswith("derived"):
            raise InputError("a derived value names its rule: give a source key starting "
                             "with 'derived'", file=file, row=i + 2, field="source",
                             value=src)
    basis = (["" if not np.isfinite(u) else "source" for u in parsed.uncertainty]
             if "uncertainty_basis" not in df.columns
             else [str(v).strip() for v in df["uncertainty_basis"]])
    for i, b in enumerate(basis):
        if b not in ("", "source", "default", "spread"):
            raise InputError("uncertainty_basis is 'source', 'default', 'spread' or empty",
                             file=file,
                             row=i + 2, field="uncertainty_basis", value=b)
    return (pd.Series(prov, index=idx, name="provenance", dtype=object),
            pd.Series(basis, index=idx, name="uncertainty_basis", dtype=object))


@lru_cache(maxsize=1)
def _catalogue() -> dict[str, Path]:
    names: dict[str, Path] = {}
    for path in sorted((DATA_DIR / "compositions").glob("*.csv")):
        name = read_header(path).get("name", path.stem)
        if name in names:
            raise InputError(f"two library files use the name {name}: {names[name].name}",
                             file=str(path), field="name", value=name)
        names[name] = path
    return names


def available(kind: str | None = None) -> list[str]:
    """Names of the components the library can load.

    Parameters
    ----------
    kind : str, optional
        Restrict to ``chondrite`` or ``silicate_reference``.

    Examples
    --------
    >>> "CI" in available()
    True
    """
    cat = _catalogue()
    if kind is None:
        return list(cat)
    return [n for n, p in cat.items() if read_header(p).get("kind") == kind]


@cache
def load(name: str) -> Component:
    """Load a library component by name (``CI``, ``CV``, ``EH``, ``BSE_MS95``...).

    Raises
    ------
    InputError
        When the name is unknown; the message lists the valid names.

    Examples
    --------
    >>> ci = load("CI")
    >>> 0.09 < float(ci.composition["Mg"]) < 0.10
    True
    """
    cat = _catalogue()
    if name not in cat:
        raise InputError(f"unknown component; the library holds {list(cat)} "
                         "(or give the path of your own component CSV)",
                         field="component", value=name)
    return _component_from_file(cat[name], require_sources=True)


def read_component(path: str | Path, *, name: str | None = None) -> Component:
    """Read a user's own component from CSV, through the library's validation.

    The file has columns ``element``, ``value``, ``unit`` (wt%, ppm, ppb; oxides such as
    ``MgO`` in wt% are converted to the element) and optionally ``uncertainty`` or
    ``uncertainty_pct`` and ``source``. ``# name:`` and ``# description:`` header lines
    are read when present.
    """
    return _component_from_file(Path(path), require_sources=False, name=name, kind=None)


@lru_cache(maxsize=1)
def elements() -> pd.DataFrame:
    """Element properties indexed by symbol.

    Columns: ``Z``, ``atomic_weight`` (g/mol, from :mod:`periodictable`),
    ``tc50_lodders2003`` and ``tc50_wood2019`` (K, 1e-4 bar), ``geochemical_class``,
    ``cosmochemical_class``, ``oxide``, ``valence``, ``oxide_factor`` (mass of oxide per
    unit mass of element), ``source``, ``recalled``.
    """
    path = DATA_DIR / "elements.csv"
    cols = ["symbol", "tc50_lodders2003", "tc50_wood2019", "geochemical_class",
            "cosmochemical_class", "oxide", "valence", "source", "recalled"]
    df = read_csv_checked(path, cols, what="element properties")
    df["symbol"] = df["symbol"].str.strip()
    df = df.set_index("symbol")
    for col in ("tc50_lodders2003", "tc50_wood2019"):
        df[col] = pd.to_numeric(df[col].replace("", np.nan), errors="raise").astype(float)
    df["valence"] = pd.to_numeric(df["valence"].replace("", "0")).astype(int)
    df["recalled"] = df["recalled"].str.strip().str.lower().isin(["yes", "true", "1"])
    z, aw, ofac = [], [], []
    from .units import atomic_weight, parse_species

    for sym, ox in zip(df.index, df["oxide"], strict=True):
        el = periodictable.elements.symbol(sym)
        z.append(el.number)
        aw.append(float(el.mass))
        sp = parse_species(ox)
        if sp is None or sp[0] != sym:
            raise InputError("oxide does not match the element", file=str(path), row=sym,
                             field="oxide", value=ox)
        _, n_cat, n_ox = sp
        ofac.append((n_cat * atomic_weight(sym) + n_ox * atomic_weight("O"))
                    / (n_cat * atomic_weight(sym)))
    df.insert(0, "Z", z)
    df.insert(1, "atomic_weight", aw)
    df["oxide_factor"] = ofac
    return df


@cache
def solar(name: str = "asplund2021") -> pd.DataFrame:
    """Solar photospheric abundances A(X) (dex, A(H) = 12) with 1-sigma.

    Parameters
    ----------
    name : str
        Table name; see :func:`solar_tables`.
    """
    names = solar_tables()
    if name not in names:
        raise InputError(f"unknown solar table; choose one of {names}", field="solar",
                         value=name)
    path = DATA_DIR / "solar" / f"{name}.csv"
    df = read_csv_checked(path, ["element", "A", "uncertainty", "source"], what="solar")
    df["element"] = df["element"].str.strip()
    df = df.set_index("element")
    df["A"] = pd.to_numeric(df["A"]).astype(float)
    df["uncertainty"] = pd.to_numeric(df["uncertainty"].replace("", np.nan)).astype(float)
    return df


def solar_tables() -> list[str]:
    """Names of the solar abundance tables held."""
    return sorted(p.stem for p in (DATA_DIR / "solar").glob("*.csv"))


@lru_cache(maxsize=1)
def isotopes() -> pd.DataFrame:
    """Isotope anomalies by body: columns body, quantity, value, uncertainty, unit, source."""
    path = DATA_DIR / "isotopes.csv"
    df = read_csv_checked(path, ["body", "quantity", "value", "uncertainty", "unit", "source"],
                          what="isotope anomalies")
    for c in ("body", "quantity", "unit", "source"):
        df[c] = df[c].str.strip()
    for col, key in (("value", "isotope_value"), ("uncertainty", "isotope_sigma")):
        lim = PLAUSIBLE[key]
        num = pd.to_numeric(df[col].str.strip().replace("", np.nan),
                            errors="coerce").astype(float)
        for i in np.flatnonzero(~(df[col].str.strip() == "").to_numpy()):
            if not lim.contains(float(num.iloc[i])):
                raise InputError(f"not a number within {lim.describe()}: {lim.reason}",
                                 file=str(path), row=i + 2, field=col, value=df[col].iloc[i])
        if col == "value" and num.isna().any():
            i = int(np.flatnonzero(num.isna().to_numpy())[0])
            raise InputError("every anomaly needs a value", file=str(path), row=i + 2,
                             field=col)
        df[col] = num
    return df


def atomic_weight_series(symbols: list[str] | pd.Index) -> pd.Series:
    """Atomic weights (g/mol) from :mod:`periodictable`, indexed by symbol."""
    return pd.Series([float(periodictable.elements.symbol(s).mass) for s in symbols],
                     index=pd.Index(list(symbols), name="element"), name="atomic_weight")
