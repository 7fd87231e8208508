"""Two-stage accretion from a case file (``[accretion] stages = 2``) and the isotope figure.

Simulate, then recover: the anomalies of a body made of CI and CV in two stages (early
CI 0.2 + CV 0.8, late CI 0.9 + CV 0.1, late stage 0.2 of the mass) or with one mixture,
computed with the library's group values and the retention 1 / (1 + D k) of the
library's Earth-calibrated D (Ni 26.5, Mo 100, Ru 1e4) at a core mass fraction of 0.32,
plus seeded observation noise of 0.03. The chemistry target is the McDonough & Sun (1995)
BSE (it only feeds the convex fit beside the staged one).
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pytest

import components
from inversion.case import load_case
from inversion.cli import main
from inversion.exceptions import InputError
from inversion.staged import case_systems, fit_case, stage_prediction
from tests.conftest import EARTH_EXCLUDE, write_case, write_target

SYSTEMS = ("e54Cr", "e50Ti", "D17O", "e64Ni", "e92Mo", "e100Ru")
X_EARLY = np.array([0.2, 0.8])
X_LATE = np.array([0.9, 0.1])
F_LATE = 0.2
CMF = 0.32
SIGMA = 0.03
# stated tolerance of the recovered mass fractions (each block, each stage)
TOL = 0.1


def _case(folder: Path, values: dict[str, float], *, candidates=("CI", "CV"),
          accretion: str | None = None) -> Path:
    iso = "\n".join(f"{k} = [{v:.6f}, {SIGMA}]" for k, v in values.items())
    acc = accretion if accretion is not None else (
        f"[accretion]\nstages = 2\nlate_stage_fraction = {F_LATE}\n"
        f"core_mass_fraction = {CMF}\n")
    return write_case(folder, candidates=list(candidates), exclude=EARTH_EXCLUDE,
                      title="two-stage test body", extra=f"[isotopes]\n{iso}\n{acc}")


@pytest.fixture(scope="module")
def body(tmp_path_factory):
    """A folder with the BSE target and the systems of a CI+CV case."""
    d = tmp_path_factory.mktemp("staged")
    bse = components.load("BSE_MS95")
    write_target(d / "target.csv", bse.composition,
                 (bse.uncertainty / bse.composition).fillna(0.15))
    case = load_case(_case(d, dict.fromkeys(SYSTEMS, 0.0)), staged=True)
    systems = case_systems(case, core_mantle_ratio=CMF / (1 - CMF))
    return d, systems


def _observed(systems, x1, x2, seed: int) -> dict[str, float]:
    eps, _ = stage_prediction(systems, x1, x2, F_LATE)
    noisy = eps + np.random.default_rng(seed).normal(0.0, SIGMA, eps.size)
    return dict(zip(SYSTEMS, map(float, noisy), strict=True))


def test_retention_of_the_case_systems(body):
    _, systems = body
    k = CMF / (1 - CMF)
    rho = {s.name: s.rho_early for s in systems}
    # lithophile carriers keep everything; siderophile ones 1 / (1 + D k)
    assert rho["e54Cr"] == rho["e50Ti"] == rho["D17O"] == 1.0
    assert rho["e64Ni"] == pytest.approx(1 / (1 + 26.530612 * k), rel=1e-6)
    assert rho["e92Mo"] == pytest.approx(1 / (1 + 100 * k))
    assert rho["e100Ru"] == pytest.approx(1 / (1 + 1e4 * k))
    assert all(s.rho_late == 1.0 for s in systems)


def test_two_stages_recovered_through_the_command_line_with_the_figure(body):
    d, systems = body
    case = _case(d, _observed(systems, X_EARLY, X_LATE, seed=1))
    out = d / "fit2"
    assert main(["fit", str(case), "--out", str(out)]) == 0
    fit = json.loads((out / "fit.json").read_text())
    st = fit["staged_accretion"]
    assert st["status"] == "fitted" and st["core_mass_fraction_from"].startswith("[accretion]")
    for stage, truth in (("early", X_EARLY), ("late", X_LATE)):
        got = np.array([st[stage]["CI"], st[stage]["CV"]])
        assert np.abs(got - truth).max() < TOL, (stage, got)
    assert st["preferred"] == "staged" and st["lr_pvalue"] < 1e-3
    # the isotope figure's data: windows at the fitted weights, the fitted anomaly
    fig = fit["isotope_figure"]
    assert set(fig["systems"]) == {"e54Cr", "e50Ti", "D17O"}
    for k, v in fit["isotopes_predicted"].items():
        assert fig["predicted"]["CI+CV"][k] == pytest.approx(v, rel=1e-9)
        lo, hi = fig["reachable"]["CI+CV"][k]
        assert lo - 1e-12 <= v <= hi + 1e-12
    assert main(["report", str(out)]) == 0
    html = (out / "report.html").read_text(encoding="utf-8")
    assert "Isotope constraints" in html and "Two-stage accretion" in html
    assert "staged preferred" in html
    # the figure is embedded: one more PNG than the figures without it
    caption = html.index("Isotope constraints")
    assert re.search(r"data:image/png;base64,", html[caption:caption + 5000])


@pytest.mark.parametrize("seed", [2, 3, 4])
def test_one_mixture_throughout_is_preferred(body, seed):
    d, systems = body
    case = load_case(_case(d, _observed(systems, X_EARLY, X_EARLY, seed)), staged=True)
    st = fit_case(case, core_mass_fraction=CMF, seed=seed)
    assert st["preferred"] == "single", st
    assert abs(st["single"]["CI"] - X_EARLY[0]) < TOL


def test_refusals_are_one_line_input_errors(body, capsys):
    d, _ = body
    vals = dict.fromkeys(SYSTEMS, 0.0)
    # a siderophile system in a one-mixture case
    with pytest.raises(InputError, match=r"siderophile.*stages = 2"):
        load_case(_case(d, {"e54Cr": 0.0, "e92Mo": 0.0}, accretion=""))
    bad = {"stages = 3\nlate_stage_fraction = 0.2": "give 1",
           "stages = true": "give 1",
           "stages = 2": "late_stage_fraction",
           "stages = 2\nlate_stage_fraction = 1.0": "strictly between 0 and 1",
           "stages = 2\nlate_stage_fraction = 0.2\ncore_mass_fraction = 0": "strictly",
           "stages = 1\nlate_stage_fraction = 0.2": "only used with",
           "stages = 2\nlate_stage_fraction = 0.2\nmass = 1": "unknown key"}
    for text, msg in bad.items():
        with pytest.raises(InputError, match=msg):
            load_case(_case(d, vals, accretion=f"[accretion]\n{text}\n"), staged=True)
    # two stages of three blocks need five systems
    with pytest.raises(InputError, match="at least 5 isotope systems"):
        load_case(_case(d, {"e54Cr": 0.0, "e50Ti": 0.0, "e92Mo": 0.0},
                        candidates=("CI", "CV", "CM")), staged=True)
    # a block without the carrier (the library's EH has no Mo)
    case = load_case(_case(d, vals, candidates=("CI", "EH")), staged=True)
    with pytest.raises(InputError, match="EH has no Mo"):
        case_systems(case, core_mantle_ratio=0.47)
    # commands that model one mixture refuse the staged case rather than ignore it
    path = _case(d, vals)
    with pytest.raises(InputError, match="planetmix fit' only"):
        load_case(path)
    capsys.readouterr()
    assert main(["rank", str(path), "--out", str(d / "rank")]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "accretion.stages" in err
    # and the fit command refuses the missing carrier before fitting
    bad_case = _case(d, vals, candidates=("CI", "EH"))
    assert main(["fit", str(bad_case), "--out", str(d / "fitbad")]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "EH has no Mo" in err
    assert not (d / "fitbad").exists()


def test_sample_report_draws_the_isotope_posterior(tmp_path):
    """A sample folder with eps_pred, eps_sigma and eps_obs (the names of
    inversion.bayes.build_model) gets the isotope figure with the posterior's interval."""
    import xarray as xr

    from inversion.report import Report, _load_idata, _sample_isotope_figure

    rng = np.random.default_rng(5)
    dims = ("chain", "draw", "isotopes")
    coords = {"isotopes": ["e54Cr", "e50Ti"]}
    post = xr.Dataset({"eps_pred": (dims, rng.normal([0.02, -0.1], 0.03, (2, 100, 2))),
                       "eps_sigma": (dims, np.full((2, 100, 2), 0.07))}, coords=coords)
    obs = xr.Dataset({"eps_obs": (("isotopes",), np.array([0.0, 0.0]))}, coords=coords)
    folder = tmp_path / "sample"
    folder.mkdir()
    post.to_netcdf(folder / "posterior.nc", group="posterior")
    obs.to_netcdf(folder / "posterior.nc", group="observed_data", mode="a")
    rep = Report(title="isotope posterior", kind="sample", folder=str(folder))
    _sample_isotope_figure(rep, _load_idata(folder / "posterior.nc"), {}, ["CI", "EH"])
    (name, caption, draw), = rep.figures
    assert name == "Isotope constraints" and "posterior median" in caption
    fig = draw()
    # one panel per system, each with the window and the posterior row
    panels = [ax for ax in fig.axes if ax.get_visible()]
    assert [ax.get_title(loc="left") for ax in panels] == ["e54Cr", "e50Ti"]
    assert [t.get_text() for t in panels[0].get_yticklabels()] == ["posterior 90%"]


def test_staged_fit_needs_a_core_size(body):
    """An infeasible convex fit and no [accretion] core_mass_fraction: the staged fit is
    not run, and fit.json says why; with the key it runs whatever the convex fit."""
    from types import SimpleNamespace

    from inversion.cli import _staged_fit, _staged_lines

    d, systems = body
    obs = _observed(systems, X_EARLY, X_LATE, seed=1)
    infeasible = SimpleNamespace(feasible=False, core_mass_fraction=float("nan"))
    no_cmf = f"[accretion]\nstages = 2\nlate_stage_fraction = {F_LATE}\n"
    st = _staged_fit(load_case(_case(d, obs, accretion=no_cmf), staged=True), infeasible)
    assert st["status"] == "not run" and "core_mass_fraction" in st["reason"]
    assert _staged_lines(st) == [f"two stages: not run ({st['reason']})"]
    st = _staged_fit(load_case(_case(d, obs), staged=True), infeasible)
    assert st["status"] == "fitted" and st["core_mass_fraction"] == CMF
