"""Generate the demo scenario's invented data from a stated hidden truth.

The scenario (invented for the demo only): the rocky planet Orrin, 0.8 Earth masses,
orbiting the invented star Kestrel-7. Its mantle composition (``orrin_mantle.csv``) is
simulated here from a known recipe, then perturbed by measurement-like noise; the
star's photospheric abundances (``kestrel7.csv``) are invented too. ``planetmix demo``
fits them and shows that the recipe below is recovered.

Run from the repository root: ``.venv/bin/python case_studies/demo/make_demo_data.py``.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parents[1]))

import components  # noqa: E402
from inversion.case import load_case  # noqa: E402
from inversion.model import compile_problem, forward  # noqa: E402
from inversion.planet import assemble  # noqa: E402

#: The hidden truth (reference-element, Mg-basis weights).
TRUTH = {
    "weights": {"H": 0.50, "EH": 0.30, "CV": 0.20},
    "volatility": {"form": "kinked", "T0": 1300.0, "slope": 0.003},
    "mantle_FeO_wt": 9.0,
    "late_accretion_fraction": 0.004,
    "noise_dex": 0.013,  # 3% (1-sigma) scatter on every concentration
    "seed": 20261201,
}
CANDIDATES = ["CI", "CV", "H", "EH"]


def main() -> None:
    """Write orrin_mantle.csv, kestrel7.csv and truth.json beside this script."""
    ci = components.load("CI")
    seed_target = HERE / "_seed_target.csv"
    pd.DataFrame({"element": ci.composition.index, "value": ci.composition * 1e6,
                  "unit": "ppm", "uncertainty_pct": 5.0}).to_csv(seed_target, index=False)
    case_text = (HERE / "orrin.toml").read_text().replace("orrin_mantle.csv",
                                                          "_seed_target.csv")
    seed_case = HERE / "_seed_case.toml"
    seed_case.write_text(case_text)
    try:
        p = compile_problem(load_case(seed_case))
    finally:
        seed_case.unlink()
        seed_target.unlink()
    w = np.array([[TRUTH["weights"].get(c, 0.0) for c in p.components]])
    vol = np.array([[TRUTH["volatility"]["T0"], TRUTH["volatility"]["slope"]]])
    fwd = forward(p, w, vol, TRUTH["late_accretion_fraction"])
    planet = assemble(p, fwd)
    conc = pd.Series(planet["mantle_mass_fraction"][0], index=list(p.elements))
    conc = conc / (conc * p.oxide_factor).sum()
    rng = np.random.default_rng(TRUTH["seed"])
    noisy = conc * 10 ** rng.normal(0.0, TRUTH["noise_dex"], size=conc.size)
    props = components.elements()
    rows = []
    for e, v in noisy.items():
        ox = props.loc[e, "oxide"]
        if ox in ("SiO2", "MgO", "FeO", "Al2O3", "CaO", "Na2O", "TiO2", "Cr2O3", "MnO"):
            f = components.oxide_to_element_factor(*components.parse_species(ox))
            rows.append((ox, round(v / f * 100, 4), "wt%", 3.0, "invented (demo)"))
        elif v > 1e-6:
            rows.append((e, float(f"{v * 1e6:.4g}"), "ppm", 3.0, "invented (demo)"))
        else:
            rows.append((e, float(f"{v * 1e9:.4g}"), "ppb", 3.0, "invented (demo)"))
    pd.DataFrame(rows, columns=["element", "value", "unit", "uncertainty_pct", "source"]
                 ).to_csv(HERE / "orrin_mantle.csv", index=False)
    # the invented host star: slightly metal-rich, Mg-poor relative to the Sun
    star = pd.DataFrame({
        "element": ["Fe", "Mg", "Si", "Ca", "Al", "Na", "Ni", "Cr", "Ti", "Mn", "S", "K"],
        "value": [0.12, 0.05, 0.08, 0.06, 0.09, 0.10, 0.13, 0.11, 0.05, 0.14, 0.07, 0.02],
        "uncertainty": [0.03, 0.04, 0.04, 0.05, 0.05, 0.06, 0.04, 0.05, 0.05, 0.06, 0.08, 0.08],
    })
    star.to_csv(HERE / "kestrel7.csv", index=False)
    truth = dict(TRUTH, core_mass_fraction=float(fwd["cmf"][0]),
                 mass_fractions=dict(zip(p.components, map(float, fwd["x"][0]), strict=True)))
    (HERE / "truth.json").write_text(json.dumps(truth, indent=2) + "\n")
    print(f"wrote {HERE / 'orrin_mantle.csv'}, kestrel7.csv and truth.json "
          f"(true CMF {truth['core_mass_fraction']:.3f})")


if __name__ == "__main__":
    main()
