"""The hand-off to interior-structure modellers: ``planet.json`` and ``planet_draws.csv``.

One writer for every command that produces a planet (``star``, ``batch``, ``fit``,
``sample``). It takes arrays of draws (B >= 1) and writes medians and the 68 % and 95 %
central intervals; for a single point estimate (B = 1, e.g. a convex fit) the intervals
collapse onto the value. The schema is documented in ``docs/handoff.md``.

Examples
--------
>>> import numpy as np, tempfile, json, pathlib
>>> d = PlanetDraws(core_mass_fraction=np.array([0.30, 0.32, 0.34]),
...                 mantle_oxides_wt={"MgO": np.array([38.0, 38.5, 39.0])},
...                 core_wt={"Fe": np.array([85.0, 86.0, 87.0])},
...                 molar_ratios={"Mg/Si_bulk": np.array([1.0, 1.05, 1.1])})
>>> folder = pathlib.Path(tempfile.mkdtemp())
>>> data = write_handoff(folder, d, meta={"title": "example"})
>>> json.loads((folder / "planet.json").read_text())["core_mass_fraction"]["median"]
0.32
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from components.exceptions import SolverError

from .heat import HISTORY_GYR, heat_history
from .planet import MAJOR_OXIDES

__all__ = ["PlanetDraws", "planet_draws", "summarise", "write_handoff", "fit_handoff",
           "STATS", "PERCENTILES", "SCHEMA_VERSION"]

SCHEMA_VERSION = "1"
#: Reported statistics and their percentiles.
STATS: tuple[str, ...] = ("p2.5", "p16", "median", "p84", "p97.5")
PERCENTILES: tuple[float, ...] = (2.5, 16.0, 50.0, 84.0, 97.5)


def summarise(x: np.ndarray) -> dict[str, float]:
    """Median and 68 %/95 % central interval of draws (NaN draws ignored).

    Examples
    --------
    >>> summarise(np.array([1.0]))["p97.5"]
    1.0
    """
    x = np.asarray(x, float).ravel()
    x = x[np.isfinite(x)]
    if x.size == 0:
        return dict.fromkeys(STATS, float("nan"))
    q = np.percentile(x, PERCENTILES)
    return dict(zip(STATS, map(float, q), strict=True))


@dataclass(frozen=True)
class PlanetDraws:
    """Draws (B >= 1) of a planet: every array has length B (history: (B, T)).

    Attributes
    ----------
    core_mass_fraction : (B,) kg/kg
    mantle_oxides_wt : oxide -> (B,) wt% of the mantle (major oxides)
    core_wt : element -> (B,) wt% of the core
    molar_ratios : name -> (B,) molar ratios (bulk and mantle, Mg# of the mantle)
    mantle_trace_ppm : element -> (B,) µg/g of the mantle (elements not reported as a
        major oxide, e.g. U, Th, S)
    bulk_wt : element -> (B,) wt% of the bulk planet (O from the oxide stoichiometry)
    heat_w_per_kg : (B,) W per kg of mantle today, or None
    heat_total_w : (B,) W for the mantle of the given planet mass, or None
    heat_history_w_per_kg : (B, T) W per kg of mantle at ``history_gyr`` before present
    history_gyr : (T,) Gyr before present
    n_unphysical : number of draws left out (NaN) because their reservoirs were not
        physical (a negative core or core iron mass, :func:`inversion.kernel.physical_state`)
    """

    core_mass_fraction: np.ndarray
    mantle_oxides_wt: dict[str, np.ndarray]
    core_wt: dict[str, np.ndarray]
    molar_ratios: dict[str, np.ndarray]
    mantle_trace_ppm: dict[str, np.ndarray] = field(default_factory=dict)
    bulk_wt: dict[str, np.ndarray] = field(default_factory=dict)
    heat_w_per_kg: np.ndarray | None = None
    heat_total_w: np.ndarray | None = None
    heat_history_w_per_kg: np.ndarray | None = None
    history_gyr: tuple[float, ...] = HISTORY_GYR
    planet_mass_kg: float | None = None
    n_unphysical: int = 0

    def masked(self, keep: np.ndarray) -> PlanetDraws:
        """The same draws with every value of the draws not kept set to NaN (left out of
        the statistics)."""
        keep = np.asarray(keep, bool)
        if keep.all():
            return self

        def m(x: np.ndarray | None) -> np.ndarray | None:
            if x is None:
                return None
            x = np.array(x, float, copy=True)
            x[~keep] = np.nan
            return x

        def md(d: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
            return {k: m(v) for k, v in d.items()}

        from dataclasses import replace

        return replace(self, core_mass_fraction=m(self.core_mass_fraction),
                       mantle_oxides_wt=md(self.mantle_oxides_wt), core_wt=md(self.core_wt),
                       molar_ratios=md(self.molar_ratios),
                       mantle_trace_ppm=md(self.mantle_trace_ppm), bulk_wt=md(self.bulk_wt),
                       heat_w_per_kg=m(self.heat_w_per_kg), heat_total_w=m(self.heat_total_w),
                       heat_history_w_per_kg=m(self.heat_history_w_per_kg))

    @property
    def n_draws(self) -> int:
        """Number of draws B."""
        return int(np.asarray(self.core_mass_fraction).size)

    def to_dataframe(self, *, bulk: bool = True, history: bool = True) -> pd.DataFrame:
        """One row per draw; column names carry the reservoir and unit (see
        ``docs/handoff.md``): ``core_mass_fraction``, ``mantle_<oxide>_wt``,
        ``mantle_<element>_ppm``, ``core_<element>_wt``, ``bulk_<element>_wt``, the molar
        ratios by name, ``heat_W_per_kg``, ``heat_total_W``, ``heat_W_per_kg_<t>Gyr``."""
        return pd.DataFrame(self.columns(bulk=bulk, history=history))

    def columns(self, *, bulk: bool = True, history: bool = True) -> dict[str, np.ndarray]:
        """The columns of :meth:`to_dataframe`, by name, as arrays of length B."""
        cols: dict[str, np.ndarray] = {"core_mass_fraction": np.asarray(
            self.core_mass_fraction, float)}
        cols.update({f"mantle_{k}_wt": v for k, v in self.mantle_oxides_wt.items()})
        cols.update({f"mantle_{k}_ppm": v for k, v in self.mantle_trace_ppm.items()})
        cols.update({f"core_{k}_wt": v for k, v in self.core_wt.items()})
        if bulk:
            cols.update({f"bulk_{k}_wt": v for k, v in self.bulk_wt.items()})
        cols.update(self.molar_ratios)
        if self.heat_w_per_kg is not None:
            cols["heat_W_per_kg"] = self.heat_w_per_kg
        if self.heat_total_w is not None:
            cols["heat_total_W"] = self.heat_total_w
        if history and self.heat_history_w_per_kg is not None:
            for j, t in enumerate(self.history_gyr):
                cols[f"heat_W_per_kg_{t:g}Gyr"] = self.heat_history_w_per_kg[:, j]
        return cols


def planet_draws(p: Any, planet: dict[str, Any], *,
                 planet_mass_kg: float | None = None) -> PlanetDraws:
    """Hand-off draws from :func:`inversion.planet.assemble` output (any B).

    Mantle species listed in :data:`inversion.planet.MAJOR_OXIDES` are reported as oxide
    wt%; the others as element µg/g. Core elements: Fe and those with a positive
    effective D (``p.D``), Fe first. Heat production from the mantle's U, Th and K (zero where the
    model holds none of them).

    Parameters
    ----------
    p : Problem
        The problem the planet was assembled with (element axis, oxide factors).
    planet : dict
        Output of :func:`inversion.planet.assemble`.
    planet_mass_kg : float, optional
        Planet mass [kg] for the total heat production of its mantle.
    """
    els = list(planet["elements"])
    oxides = list(planet["oxides"])
    mo = planet["mantle_oxides_wt"]
    cf = planet["mantle_mass_fraction"]
    ox_total = (cf * p.oxide_factor[None, :]).sum(axis=1)
    conc = cf / ox_total[:, None]  # kg element per kg mantle
    order = {o: i for i, o in enumerate(MAJOR_OXIDES)}
    major = sorted((j for j in range(len(els)) if oxides[j] in order),
                   key=lambda j: order[oxides[j]])
    mantle_ox = {oxides[j]: mo[:, j] for j in major}
    trace = {els[j]: conc[:, j] * 1e6 for j in range(len(els)) if oxides[j] not in order}
    cw = planet["core_wt"]
    # elements that can enter the core (D > 0, and Fe), Fe first, then in element order:
    # the same columns for every set of draws of a problem
    fe = els.index("Fe") if "Fe" in els else None
    order = ([fe] if fe is not None else []) + [j for j in range(len(els))
                                                 if j != fe and p.D[j] > 0]
    core = {els[j]: cw[:, j] for j in order}
    bw = planet["bulk_wt"]
    bulk = {e: bw[:, j] for j, e in enumerate(planet["bulk_elements"])}
    ratios = {k: np.asarray(v, float) for k, v in planet["ratios"].items()}
    ix = {e: j for j, e in enumerate(els)}
    B = cf.shape[0]

    def c(e: str) -> np.ndarray:
        return conc[:, ix[e]] if e in ix else np.zeros(B)

    hist = heat_history(c("U"), c("Th"), c("K"), HISTORY_GYR)
    cmf = np.asarray(planet["cmf"], float)
    total = hist[:, 0] * planet_mass_kg * (1.0 - cmf) if planet_mass_kg else None
    draws = PlanetDraws(core_mass_fraction=cmf, mantle_oxides_wt=mantle_ox, core_wt=core,
                        molar_ratios=ratios, mantle_trace_ppm=trace, bulk_wt=bulk,
                        heat_w_per_kg=hist[:, 0], heat_total_w=total,
                        heat_history_w_per_kg=hist, history_gyr=HISTORY_GYR,
                        planet_mass_kg=planet_mass_kg)
    physical = np.asarray(planet.get("physical", np.ones(B, bool)), bool)
    if not physical.any():
        raise SolverError("no draw gives a physical planet (the core or its iron mass is "
                          "negative: the mantle needs more iron than the bulk holds)")
    if not physical.all():
        from dataclasses import replace

        draws = replace(draws.masked(physical), n_unphysical=int((~physical).sum()))
    return draws


def _block(d: dict[str, np.ndarray]) -> dict[str, dict[str, float]]:
    return {k: summarise(v) for k, v in d.items()}


def write_handoff(folder: str | Path, draws: PlanetDraws, *,
                  meta: dict[str, Any] | None = None,
                  draws_csv: bool = True) -> dict[str, Any]:
    """Write ``planet.json`` (and ``planet_draws.csv``) into ``folder``.

    Write inside :func:`inversion.output.atomic_folder` so that the files appear together.

    Parameters
    ----------
    folder : str or Path
        An existing folder.
    draws : PlanetDraws
        B >= 1 draws; with B = 1 every interval collapses onto the value.
    meta : dict, optional
        Extra top-level keys (title, method, settings, flags, provenance...).
    draws_csv : bool
        Also write one row per draw to ``planet_draws.csv``.

    Returns
    -------
    dict
        The content of ``planet.json``.
    """
    from .output import write_json

    folder = Path(folder)
    heat: dict[str, Any] = {
        "basis": "radiogenic heat from 238U, 235U, 232Th and 40K in the mantle "
                 "(Turcotte & Schubert 2014, Table 4.2)",
        "w_per_kg_mantle": summarise(draws.heat_w_per_kg) if draws.heat_w_per_kg is not None
        else None,
        "total_w": summarise(draws.heat_total_w) if draws.heat_total_w is not None else None,
        "planet_mass_kg": draws.planet_mass_kg,
        "history": None,
    }
    if draws.heat_history_w_per_kg is not None:
        heat["history"] = {"time_before_present_gyr": list(draws.history_gyr),
                           "w_per_kg_mantle": [summarise(draws.heat_history_w_per_kg[:, j])
                                               for j in range(len(draws.history_gyr))]}
    data: dict[str, Any] = {"schema": f"planetmix hand-off {SCHEMA_VERSION}"}
    data.update(meta or {})
    data.update({
        "n_draws": draws.n_draws,
        "unphysical_draws_left_out": draws.n_unphysical,
        "statistics": {"median": "50th percentile", "p16": "16th", "p84": "84th (p16-p84: "
                       "68 % central interval)", "p2.5": "2.5th", "p97.5": "97.5th (p2.5-p97.5: "
                       "95 % central interval)"},
        "units": {"core_mass_fraction": "kg/kg", "mantle_oxides_wt": "wt% of the mantle",
                  "mantle_trace_ppm": "µg/g of the mantle (element)",
                  "core_wt": "wt% of the core (element)", "bulk_wt": "wt% of the planet",
                  "molar_ratios": "mol/mol", "heat_production.w_per_kg_mantle": "W/kg",
                  "heat_production.total_w": "W"},
        "core_mass_fraction": summarise(draws.core_mass_fraction),
        "mantle_oxides_wt": _block(draws.mantle_oxides_wt),
        "mantle_trace_ppm": _block(draws.mantle_trace_ppm),
        "core_wt": _block(draws.core_wt),
        "bulk_wt": _block(draws.bulk_wt),
        "molar_ratios": _block(draws.molar_ratios),
        "heat_production": heat,
    })
    write_json(folder / "planet.json", data)
    if draws_csv:
        df = draws.to_dataframe()
        df.insert(0, "draw", np.arange(len(df)))
        df.to_csv(folder / "planet_draws.csv", index=False, float_format="%.8g")
    return data


def fit_handoff(folder: str | Path, p: Any, result: Any, *,
                planet_mass_kg: float | None = None,
                meta: dict[str, Any] | None = None) -> dict[str, Any]:
    """Write the hand-off of a convex fit (one point estimate: the intervals collapse).

    Parameters
    ----------
    folder : str or Path
        An existing folder (e.g. the one of :func:`inversion.output.atomic_folder`).
    p : Problem
        The compiled problem of the fit.
    result : FitResult
        An optimal result of :func:`inversion.fit.fit_problem`.
    planet_mass_kg : float, optional
        Planet mass [kg] for the total heat production.
    meta : dict, optional
        Extra top-level keys.
    """
    from .fit import forward_of
    from .planet import assemble

    fwd = forward_of(p, result)
    draws = planet_draws(p, assemble(p, fwd), planet_mass_kg=planet_mass_kg)
    info = {"method": "convex fit (point estimate: the intervals collapse onto the value)",
            "components": list(p.components), "weights": result.weights,
            "volatility": {"form": result.volatility_form, **result.volatility},
            "late_accretion_fraction": result.late_accretion_fraction}
    info.update(meta or {})
    return write_handoff(folder, draws, meta=info)
