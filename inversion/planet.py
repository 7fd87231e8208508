"""Whole-planet assembly (docs/model.md section 7): mantle oxides, core, bulk, molar ratios.

Vectorised over parameter sets: every function takes the output of
:func:`inversion.model.forward` for B sets and returns arrays with a leading B axis.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

import components

from .model import Problem

__all__ = ["assemble", "MAJOR_OXIDES", "planet_table", "RATIO_NAMES"]

#: Oxides reported as the mantle's major-element composition (wt%, summing to 100 with
#: the minor oxides of the other modelled elements).
MAJOR_OXIDES = ("SiO2", "TiO2", "Al2O3", "Cr2O3", "FeO", "MnO", "MgO", "CaO", "Na2O", "K2O",
                "P2O5", "NiO")
RATIO_NAMES = ("Mg/Si_bulk", "Fe/Si_bulk", "Fe/Mg_bulk", "Ca/Al_bulk", "Mg/Si_mantle",
               "Mg#_mantle", "Ca/Al_mantle")


def assemble(p: Problem, fwd: dict[str, np.ndarray]) -> dict[str, object]:
    """Mantle oxides (wt%), core (wt%), bulk (wt%), molar ratios and CMF.

    The final mantle includes the late-accreted material. Oxygen in the mantle comes from
    the oxide stoichiometry; the core is the metal (with S and the other siderophiles).

    Returns
    -------
    dict
        ``oxides`` (list of names), ``mantle_oxides_wt`` (B, n) in the order of
        ``oxides``; ``core_elements`` and ``core_wt`` (B, n); ``bulk_elements`` and
        ``bulk_wt`` (B, n + 1, the last column oxygen); ``ratios`` dict name -> (B,);
        ``cmf`` (B,).
    """
    props = components.elements()
    els = list(p.elements)
    oxides = [props.loc[e, "oxide"] for e in els]
    lam = fwd["lam"][:, None]
    # final mantle: (1 - lam) parts of the pre-late mantle and lam parts of the late
    # component, by mass, per unit mass of final mantle
    M_s = fwd["M_s"][:, None]
    c_pre = fwd["mantle"] / M_s
    if p.late_name is not None:
        c_late = p.q_late[None, :] * p.c_late_R
    else:
        c_late = np.zeros_like(c_pre)
    c_final = (1.0 - lam) * c_pre + lam * c_late
    ox_mass = c_final * p.oxide_factor[None, :]
    mantle_ox = 100.0 * ox_mass / ox_mass.sum(axis=1, keepdims=True)
    # a negative core mass is an unphysical state (``physical`` False): clipped here only
    # so that the tables stay readable; the hand-off leaves such draws out
    core = np.clip(fwd["core"], 0.0, None)
    core_wt = 100.0 * core / np.maximum(core.sum(axis=1, keepdims=True), 1e-300)
    mant = fwd["mantle"]
    o_mass = (mant * (p.oxide_factor[None, :] - 1.0)).sum(axis=1, keepdims=True)
    bulk = np.concatenate([mant + core, o_mass], axis=1)
    bulk_wt = 100.0 * bulk / bulk.sum(axis=1, keepdims=True)
    aw = p.atomic_weight
    ix = {e: i for i, e in enumerate(els)}

    def mol(arr: np.ndarray, e: str) -> np.ndarray:
        return arr[:, ix[e]] / aw[ix[e]] if e in ix else np.full(arr.shape[0], np.nan)

    tot = fwd["bulk"]
    ratios = {
        "Mg/Si_bulk": mol(tot, "Mg") / mol(tot, "Si"),
        "Fe/Si_bulk": mol(tot, "Fe") / mol(tot, "Si"),
        "Fe/Mg_bulk": mol(tot, "Fe") / mol(tot, "Mg"),
        "Ca/Al_bulk": mol(tot, "Ca") / mol(tot, "Al"),
        "Mg/Si_mantle": mol(c_final, "Mg") / mol(c_final, "Si"),
        "Mg#_mantle": mol(c_final, "Mg") / (mol(c_final, "Mg") + mol(c_final, "Fe")),
        "Ca/Al_mantle": mol(c_final, "Ca") / mol(c_final, "Al"),
    }
    return {"elements": els, "oxides": oxides, "mantle_oxides_wt": mantle_ox,
            "mantle_mass_fraction": c_final, "core_wt": core_wt, "bulk_wt": bulk_wt,
            "bulk_elements": els + ["O"], "ratios": ratios, "cmf": fwd["cmf"],
            "physical": np.asarray(fwd.get("physical", np.ones(lam.shape[0], bool)), bool)}


def planet_table(p: Problem, planet: dict[str, object], index: int = 0) -> pd.DataFrame:
    """Tidy table of one parameter set's planet: reservoir, species, value, unit.

    Mantle: major oxides in wt%, other elements in µg/g (ppm); core and bulk: element wt%.
    """
    rows = []
    els = planet["elements"]
    ox = planet["oxides"]
    mo = planet["mantle_oxides_wt"][index]
    cf = planet["mantle_mass_fraction"][index]
    ox_total = float((cf * p.oxide_factor).sum())
    for j in range(len(els)):
        if ox[j] in MAJOR_OXIDES:
            rows.append(("mantle", ox[j], mo[j], "wt%"))
    for j, e in enumerate(els):
        if ox[j] not in MAJOR_OXIDES:
            rows.append(("mantle", e, cf[j] / ox_total * 1e6, "ppm"))
    cw = planet["core_wt"][index]
    for j in np.argsort(-cw):
        if cw[j] > 0:
            rows.append(("core", els[j], cw[j], "wt%"))
    bw = planet["bulk_wt"][index]
    for j in np.argsort(-bw):
        rows.append(("bulk", planet["bulk_elements"][j], bw[j], "wt%"))
    for name, val in planet["ratios"].items():
        rows.append(("ratio", name, float(np.asarray(val)[index]), "molar"))
    rows.append(("planet", "core_mass_fraction", float(planet["cmf"][index]), "kg/kg"))
    return pd.DataFrame(rows, columns=["reservoir", "species", "value", "unit"])
