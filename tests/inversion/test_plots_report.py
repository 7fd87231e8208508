"""Figures, the HTML report and the input templates."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import components
from inversion import plots
from inversion.case import load_case, read_target
from inversion.cli import main
from inversion.model import compile_problem
from inversion.report import detect_kind
from inversion.report_cli import TEMPLATES, template_text
from tests.conftest import EARTH_EXCLUDE, write_case

REPO = Path(__file__).resolve().parents[2]
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


# ----------------------------------------------------------------- result folders
@pytest.fixture(scope="module")
def result_folders(shared_results) -> dict[str, Path]:
    """A fit and a rank folder of the McDonough & Sun (1995) BSE against CI and H."""
    return shared_results


def _residuals() -> pd.DataFrame:
    els = ["Al", "Ca", "Mg", "Si", "Fe", "Ni", "Ir", "Na", "K", "Zn", "S", "Pb"]
    tc = components.elements().loc[els, "tc50_lodders2003"].to_numpy()
    rng = np.random.default_rng(3)
    model = np.minimum(0.0, 0.002 * (tc - 1350.0))
    obs = model + rng.normal(0, 0.05, len(els))
    obs[-1] += 0.6
    sigma = np.full(len(els), 0.05)
    z = (obs - model) / sigma
    flag = np.where(np.abs(z) > 3, np.where(z > 0, "above model", "below model"), "")
    return pd.DataFrame({"element": els, "tc50": tc, "observed": obs, "model": model,
                         "sigma": sigma, "z": z, "fitted": [True] * 10 + [False] * 2,
                         "flag": flag, "model_lo": model - 0.05, "model_hi": model + 0.05})


def _planet() -> pd.DataFrame:
    rows = [("mantle", "SiO2", 45.0, "wt%"), ("mantle", "MgO", 38.0, "wt%"),
            ("mantle", "FeO", 8.0, "wt%"), ("mantle", "U", 0.02, "ppm"),
            ("mantle", "Th", 0.08, "ppm"), ("mantle", "K2O", 0.03, "wt%"),
            ("core", "Fe", 85.0, "wt%"), ("core", "Ni", 5.0, "wt%"),
            ("ratio", "Mg/Si_bulk", 1.1, "molar"), ("planet", "core_mass_fraction", 0.32,
                                                    "kg/kg")]
    df = pd.DataFrame(rows, columns=["reservoir", "species", "value", "unit"])
    return df.assign(lo=df["value"] * 0.9, hi=df["value"] * 1.1)


def _is_png(fig) -> bool:
    data = plots.png_bytes(fig)
    plots.plt.close(fig)
    return data.startswith(PNG_MAGIC) and len(data) > 5000


def _colours(fig) -> list[tuple[float, float, float]]:
    """Every colour a figure's data artists use (lines, markers, collections, patches)."""
    from matplotlib.colors import to_rgba, to_rgba_array

    out = []
    for ax in fig.axes:
        for ln in ax.lines:
            out += [to_rgba(c) for c in (ln.get_color(), ln.get_markerfacecolor(),
                                         ln.get_markeredgecolor()) if c != "none"]
        for col in ax.collections:
            for arr in (col.get_facecolor(), col.get_edgecolor()):
                out += [tuple(c) for c in to_rgba_array(arr)]
        for patch in ax.patches:
            out += [patch.get_facecolor(), patch.get_edgecolor()]
    return [c[:3] for c in out if c[3] > 0]


def _check_house_style(fig, name: str) -> None:
    """One or two journal columns wide; every colour of the Okabe & Ito (2008) palette
    or a grey (black and white included)."""
    from matplotlib.colors import to_rgb

    width = fig.get_size_inches()[0]
    assert width == pytest.approx(plots.SINGLE_COLUMN) or width == pytest.approx(
        plots.DOUBLE_COLUMN), (name, width)
    palette = np.array([to_rgb(c) for c in plots.OKABE_ITO.values()])
    with plots.plot_style():  # cycle colours ("C0") resolve as they do when saved
        colours = _colours(fig)
    for c in colours:
        grey = max(c) - min(c) < 0.02
        assert grey or np.abs(palette - np.array(c)).max(axis=1).min() < 0.01, (name, c)


# ----------------------------------------------------------------- figures
def test_every_figure_function_draws_a_png(tmp_path):
    res = _residuals()
    draws = pd.DataFrame(np.random.default_rng(0).normal(size=(300, 3)) * [50, 0.0003, 0.001]
                         + [1350, 0.002, 0.005], columns=["T0", "slope", "lam"])
    ranking = pd.DataFrame({"components": ["CI", "CI+H", "H", "CV+EH"],
                            "status": ["optimal", "optimal", "optimal", "infeasible"],
                            "bic": [10.0, 11.5, 30.0, np.inf], "aic": [8.0, 9.0, 28.0, np.inf]})
    heat = pd.DataFrame({"time_Gyr_ago": np.linspace(0, 4.5, 10), "238U": np.linspace(8, 16, 10),
                         "235U": np.linspace(0.3, 23, 10), "232Th": np.full(10, 8.0),
                         "40K": np.linspace(3, 40, 10)})
    heat["total"] = heat[["238U", "235U", "232Th", "40K"]].sum(axis=1)
    figs = {
        "volatility": plots.volatility_diagram(
            res, volatility={"form": "kinked", "T0": 1350.0, "slope": 0.002},
            volatility_draws=draws[["T0", "slope"]].to_numpy(), title="synthetic"),
        "residuals": plots.residuals_plot(res),
        "weights": plots.weights_plot({"CI": 0.4, "H": 0.6}, mass_fractions={"CI": 0.5,
                                                                             "H": 0.5}),
        "weights_draws": plots.weights_plot(
            {"CI": 0.4, "H": 0.6}, draws=pd.DataFrame({"CI": np.linspace(0.3, 0.5, 50),
                                                       "H": np.linspace(0.7, 0.5, 50)})),
        "pairs": plots.pair_plot(draws, truth={"T0": 1350.0}),
        "ranking": plots.ranking_plot(ranking),
        "planet": plots.planet_plot(_planet(),
                                    reference={"core_mass_fraction": (0.325, "Earth")}),
        "heat": plots.heat_plot(heat),
        "distribution": plots.distribution_plot(pd.DataFrame({
            "cmf": np.random.default_rng(1).uniform(0.2, 0.4, 40),
            "Mg/Si": np.random.default_rng(2).uniform(0.9, 1.3, 40)})),
        "traces": plots.trace_rank_plot({"T0": draws["T0"].to_numpy().reshape(2, 150)}),
        "prior": plots.prior_posterior_plot(
            {"T0": draws["T0"].to_numpy()}, {"T0": {"dist": "Uniform", "lower": 900.0,
                                                    "upper": 1700.0}}),
        "predictive": plots.predictive_plot(res.assign(
            pp_lo=res["model"] - 0.1, pp_q25=res["model"] - 0.03, pp_q50=res["model"],
            pp_q75=res["model"] + 0.03, pp_hi=res["model"] + 0.1)),
        "isotopes": plots.isotope_plot({"e54Cr": (0.0, 0.1)},
                                       {"CI+H": {"e54Cr": (-0.3, 0.6)}}),
        "siderophile": plots.siderophile_plot(res, {"sources": {"Ni": "regression"},
                                                    "pressure_GPa": 40.0,
                                                    "temperature_K": 3000.0, "dIW": -2.0}),
    }
    for name, fig in figs.items():
        _check_house_style(fig, name)
        assert _is_png(fig), name
    # SVG too, through the file writer
    fig = plots.residuals_plot(res)
    paths = plots.save_figure(fig, tmp_path / "resid")
    assert [p.suffix for p in paths] == [".png", ".svg"]
    svg = (tmp_path / "resid.svg").read_text()
    assert svg.lstrip().startswith("<?xml") and "<svg" in svg
    assert not re.search(r"(href|src)=\"https?://", svg)
    assert svg.count("<text") > 20  # tick labels and axis labels stay editable text
    from PIL import Image

    with Image.open(tmp_path / "resid.png") as im:
        assert im.info["dpi"][0] == pytest.approx(300, abs=0.5)
        assert im.size[0] == round(plots.DOUBLE_COLUMN * 300)
    # symbols as subscripts and superscripts (mathtext), not plain text
    assert "_{\\mathrm{obs}}" in fig.axes[0].get_ylabel()
    labels = [t.get_text() for t in figs["heat"].axes[0].get_legend().get_texts()]
    assert r"$^{238}\mathrm{U}$" in labels
    assert f"total (today {heat['total'].iloc[0]:.3g} TW)" in labels
    assert figs["traces"].axes[0].get_ylabel() == "$T_0$ [K]"


def test_ranking_delta_is_measured_from_the_best_feasible():
    table = pd.DataFrame({"components": ["A", "B", "C"], "status": ["infeasible", "optimal",
                                                                     "optimal"],
                          "bic": [1.0, 5.0, 9.0]})
    fig = plots.ranking_plot(table)
    ax = fig.axes[0]
    labels = [t.get_text() for t in ax.texts]
    # B is the best feasible hypothesis (delta 0), C is 4 above it, A is infeasible
    assert "0.0" in labels and "4.0" in labels and "infeasible" in labels
    plots.plt.close(fig)


# ----------------------------------------------------------------- report
def _no_external(html: str) -> None:
    assert not re.search(r"""(src|href)\s*=\s*['"]?\s*(https?:)?//""", html, re.I)
    assert "<script" not in html.lower()
    assert "<link" not in html.lower()


def test_fit_report_is_self_contained(result_folders):
    folder = result_folders["fit"]
    assert detect_kind(folder) == "fit"
    assert main(["report", str(folder)]) == 0
    html = (folder / "report.html").read_text(encoding="utf-8")
    for section in ("Key numbers", "Figures", "Diagnostics", "Provenance",
                    "Limits of the model", "Volatility diagram", "Residuals by element",
                    "Building-block weights", "Whole planet", "core mass fraction"):
        assert section in html, section
    imgs = re.findall(r"src='data:image/png;base64,([A-Za-z0-9+/=]+)'", html)
    assert len(imgs) >= 4
    import base64

    assert all(base64.b64decode(i).startswith(PNG_MAGIC) for i in imgs)
    _no_external(html)
    # the numbers of the result appear in the report
    import json

    fit = json.loads((folder / "fit.json").read_text())
    assert f"{fit['core_mass_fraction']:.4g}" in html
    # parameters with their units; no Python list printed
    assert "volatility slope [dex/K]" in html and "['" not in html
    # atomic write: no temporary files left behind
    assert not [p for p in folder.iterdir() if p.name.startswith(".report.")]


def test_rank_report(result_folders, tmp_path):
    folder = result_folders["rank"]
    out = tmp_path / "r.html"
    assert main(["report", str(folder), "--out", str(out)]) == 0
    html = out.read_text(encoding="utf-8")
    assert "Hypothesis ranking (BIC)" in html and "best hypothesis" in html
    assert len(re.findall(r"data:image/png;base64,", html)) >= 2
    _no_external(html)
    table = pd.read_csv(folder / "ranking.csv")
    assert str(table.loc[0, "components"]) in html
    # the table's headers carry units; the late accretion is shown in % of the mantle
    for head in ("T0 [K]", "slope [dex/K]", "late accretion [% of mantle]", "BIC"):
        assert f"<th>{head}</th>" in html, head
    assert _fmt_pct(100 * table.loc[0, "late_accretion_fraction"]) in html


def _fmt_pct(v: float) -> str:
    from inversion.report import _fmt

    return _fmt(v)


def test_report_of_a_folder_that_is_no_result(tmp_path, capsys):
    (tmp_path / "notes.txt").write_text("hello")
    assert main(["report", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert "unknown result folder" in err and str(tmp_path) in err
    assert main(["report", str(tmp_path / "missing")]) == 2
    assert not (tmp_path / "report.html").exists()


# ----------------------------------------------------------------- templates
def test_templates_match_data_templates():
    for kind, name in TEMPLATES.items():
        canonical = REPO / "data_templates" / name
        if not canonical.exists():
            pytest.fail(f"data_templates/{name} is missing")
        assert template_text(kind) == canonical.read_text(encoding="utf-8"), kind


def test_case_target_component_templates_pass_the_real_loaders(tmp_path):
    for kind in ("case", "target", "component"):
        assert main(["template", kind, "--dir", str(tmp_path)]) == 0
    case = load_case(tmp_path / "case.toml")
    assert case.target.reference_element == "Mg"
    assert case.candidate_names == ["CI", "CV", "H", "EH"]
    p = compile_problem(case)
    assert p.n_fit >= 10
    comp, unc, defaulted = read_target(tmp_path / "target.csv")
    # MgO 37.8 wt% (McDonough & Sun 1995) -> Mg 22.8 wt%
    assert comp["Mg"] == pytest.approx(0.378 * 24.305 / 40.304, rel=1e-3)
    assert not defaulted
    block = components.read_component(tmp_path / "component.csv")
    assert block.name == "MyBlock" and block.composition["Mg"] == pytest.approx(0.0961)
    # the component works as a candidate (the template says: without [isotopes])
    text = (tmp_path / "case.toml").read_text()
    text = text.replace('candidates = ["CI", "CV", "H", "EH"]',
                        'candidates = ["CI", "component.csv"]')
    lines, skip = [], False
    for line in text.splitlines():
        if line.startswith("["):
            skip = line.strip() == "[isotopes]"
        if not skip:
            lines.append(line)
    text = "\n".join(lines) + "\n"
    (tmp_path / "case.toml").write_text(text)
    case2 = load_case(tmp_path / "case.toml")
    assert case2.candidate_names == ["CI", "MyBlock"]
    # no overwrite without --force
    assert main(["template", "case", "--dir", str(tmp_path)]) == 2
    assert main(["template", "case", "--dir", str(tmp_path), "--force"]) == 0
    assert main(["template", "nonsense", "--dir", str(tmp_path)]) == 2


def test_star_and_catalog_templates_pass_the_real_loaders(tmp_path):
    from inversion.batch import read_catalogue
    from inversion.star import read_star_table

    assert main(["template", "star", "--dir", str(tmp_path)]) == 0
    assert main(["template", "catalog", "--dir", str(tmp_path)]) == 0
    star = read_star_table(tmp_path / "star_abundances.csv")
    assert star is not None
    rows, _digest = read_catalogue(tmp_path / "catalog.csv")
    assert len(rows) == 3


def test_star_and_batch_reports(shared_results):
    star_dir, batch_dir = shared_results["star"], shared_results["batch"]
    tpl = REPO / "data_templates"
    assert detect_kind(star_dir) == "star" and detect_kind(batch_dir) == "batch"
    # the parts sit alone in their folder: pandas reads the whole catalogue in one call
    whole = pd.read_parquet(batch_dir / "parts")
    n_rows = len(pd.read_csv(tpl / "catalog.csv", comment="#"))
    assert len(whole) == n_rows and whole["row"].is_unique
    for folder, expect in ((star_dir, ("Whole planet", "core_mass_fraction", "Caution",
                                       "Mg/Si (bulk, molar)", " dex/K")),
                           (batch_dir, ("Across the catalogue", "CMF, median star",
                                        "Mg/Si (bulk, molar), median star", "demo-002"))):
        assert main(["report", str(folder), "--figures"]) == 0
        html = (folder / "report.html").read_text(encoding="utf-8")
        # --figures: each figure also as PNG and SVG files
        pngs = sorted((folder / "figures").glob("*.png"))
        svgs = sorted((folder / "figures").glob("*.svg"))
        assert pngs and len(svgs) == len(pngs)
        assert all(p.read_bytes().startswith(PNG_MAGIC) for p in pngs)
        for text in expect:
            assert text in html, (folder.name, text)
        assert len(re.findall(r"data:image/png;base64,", html)) >= 1
        _no_external(html)


def _fake_sample_folder(folder: Path) -> Path:
    """A sample folder with a small synthetic posterior in the layout of
    ``inversion.bayes.build_model`` (no sampling: the report only reads it)."""
    import arviz as az

    rng = np.random.default_rng(7)
    chains, draws = 2, 150
    els = ["Al", "Ca", "Mg", "Si", "Fe", "Ni", "Na", "Zn"]
    tc = components.elements().loc[els, "tc50_lodders2003"].to_numpy()
    T0 = rng.normal(1350, 20, (chains, draws))
    slope = np.abs(rng.normal(0.002, 0.0002, (chains, draws)))
    mu = np.minimum(0.0, slope[..., None] * (tc[None, None, :] - T0[..., None]))
    x_ci = rng.uniform(0.2, 0.4, (chains, draws))
    idata = az.from_dict(
        posterior={"T0": T0, "slope": slope, "lam": rng.uniform(0, 0.01, (chains, draws)),
                   "tau": np.abs(rng.normal(0.03, 0.01, (chains, draws))),
                   "cmf": rng.normal(0.32, 0.01, (chains, draws)),
                   "x": np.stack([x_ci, 1 - x_ci], axis=-1), "mu": mu},
        posterior_predictive={"y_obs": mu + rng.normal(0, 0.05, mu.shape)},
        observed_data={"y_obs": mu.mean(axis=(0, 1)) + np.r_[0, 0, 0, 0, 0, 0.5, 0, 0]},
        dims={"x": ["components"], "mu": ["elements"], "y_obs": ["elements"]},
        coords={"components": ["CI", "EH"], "elements": els})
    folder.mkdir()
    idata.to_netcdf(str(folder / "posterior.nc"))
    import json

    def interval(v):
        q = np.percentile(v, [5, 50, 95])
        return {"median": q[1], "q05": q[0], "q95": q[2]}

    cmf = idata.posterior["cmf"].values.ravel()
    (folder / "sample.json").write_text(json.dumps({
        "title": "synthetic posterior", "components": ["CI", "EH"],
        "status": "failed diagnostics gate",
        "gate_messages": ["bulk ESS 120 < 400 (slope): run more draws"],
        "priors": {"T0": {"dist": "Uniform", "lower": 900.0, "upper": 1700.0},
                   "slope": {"dist": "HalfNormal", "sigma": 0.004},
                   "tau": {"dist": "HalfNormal", "sigma": 0.05}},
        "posterior": {"mass_fractions": {"CI": interval(x_ci), "EH": interval(1 - x_ci)},
                      "volatility": {"form": "kinked", "T0": interval(T0),
                                     "slope": interval(slope)},
                      "core_mass_fraction": interval(cmf)}}))
    pd.DataFrame({"parameter": ["T0", "slope"], "mean": [1350.0, 0.002], "sd": [20, 2e-4],
                  "q05": [1317.0, 0.0017], "q50": [1350.0, 0.002], "q95": [1383.0, 0.0023],
                  "r_hat": [1.02, 1.0], "ess_bulk": [150.0, 120.0]}).to_csv(
        folder / "summary.csv", index=False)
    pd.DataFrame({"chain": 0, "draw": np.arange(300), "core_mass_fraction": cmf,
                  "mantle_MgO_wt": rng.normal(38, 0.5, 300),
                  "mantle_SiO2_wt": rng.normal(45, 0.5, 300),
                  "core_Fe_wt": rng.normal(85, 1, 300),
                  "Mg/Si_bulk": rng.normal(1.1, 0.02, 300)}).to_parquet(
        folder / "planet_draws.parquet", index=False)
    pd.DataFrame({"element": ["Ni"], "z": [4.2], "direction": ["above model"]}).to_csv(
        folder / "outliers.csv", index=False)
    (folder / "diagnostics.json").write_text(json.dumps({
        "rhat_max": 1.02, "ess_bulk_min": 120.0, "divergences": 0, "passed": False,
        "worst_rhat_parameter": "T0", "worst_ess_parameter": "slope",
        "thresholds": {"rhat_max": 1.01, "ess_bulk_min": 400, "divergences_max": 0}}))
    return folder


def test_sample_report_from_a_posterior(tmp_path):
    folder = _fake_sample_folder(tmp_path / "sample")
    assert detect_kind(folder) == "sample"
    assert main(["report", str(folder)]) == 0
    html = (folder / "report.html").read_text(encoding="utf-8")
    for text in ("Volatility diagram", "Building blocks", "Pairwise posterior",
                 "Whole planet", "FAILED", "largest R-hat", "90% credible interval",
                 "mass fraction of CI", "run more draws", "Off-trend elements",
                 "Posterior summary", "Traces and rank histograms", "Prior and posterior",
                 "Posterior-predictive check"):
        assert text in html, text
    assert len(re.findall(r"data:image/png;base64,", html)) >= 4
    _no_external(html)
    # the synthetic posterior's data carry +0.5 dex on Ni against replicates of scatter
    # 0.05 dex: Ni, and only Ni, falls outside its 90% predictive interval
    assert "1 of 8 elements fall outside their 90% interval (Ni)" in html


def test_predictive_table_against_the_replicated_draws(tmp_path):
    import arviz as az

    from inversion.report import _predictive_table

    folder = _fake_sample_folder(tmp_path / "sample")
    idata = az.from_netcdf(str(folder / "posterior.nc"))
    tab = _predictive_table(idata, {}).set_index("element")
    rep = idata.posterior_predictive["y_obs"].values.reshape(-1, 8)
    # percentiles of the replicated observations, recomputed here by sorting
    ni = np.sort(rep[:, 5])
    n = len(ni)
    assert tab.loc["Ni", "pp_q50"] == pytest.approx(0.5 * (ni[n // 2 - 1] + ni[n // 2]))
    assert tab.loc["Ni", "pp_lo"] == pytest.approx(np.interp(0.05 * (n - 1), np.arange(n), ni))
    assert tab.loc["Ni", "observed"] == pytest.approx(
        float(idata.observed_data["y_obs"].values[5]))
    fig = plots.predictive_plot(tab.reset_index())
    ticks = {t.get_text(): t.get_fontweight() for t in fig.axes[0].get_xticklabels()}
    assert ticks["Ni"] == "bold" and ticks["Al"] == "normal"  # the element outside
    plots.plt.close(fig)


def test_compare_report(tmp_path):
    folder = tmp_path / "cmp"
    folder.mkdir()
    pd.DataFrame({"rank": [0, 1], "run": ["a", "b"], "components": ["CI+H", "H"],
                  "elpd_loo": [-40.0, -55.0], "p_loo": [5.0, 4.0], "elpd_diff": [0.0, 15.0],
                  "dse": [0.0, 4.0], "weight": [0.9, 0.1], "warning": [False, True],
                  "gate": ["passed", "failed diagnostics gate"]}).to_csv(
        folder / "comparison.csv", index=False)
    assert detect_kind(folder) == "compare"
    assert main(["report", str(folder)]) == 0
    html = (folder / "report.html").read_text(encoding="utf-8")
    for text in ("Hypothesis ranking (PSIS-LOO)", "best by PSIS-LOO", "CI+H",
                 "PSIS warning: H", "gate: H"):
        assert text in html, text
    _no_external(html)


def test_report_of_an_infeasible_fit(result_folders, tmp_path):
    """CI alone cannot meet an Earth-like e54Cr of -0.4 (CI: +1.56): the fit is
    infeasible (exit 3) and its report says so instead of showing estimates."""
    base = result_folders["base"]
    case = write_case(tmp_path, target=str(base / "target.csv"), candidates=["CI"],
                      exclude=EARTH_EXCLUDE, title="infeasible",
                      extra="[isotopes]\ne54Cr = [-0.4, 0.05]\n")
    out = tmp_path / "infeasible"
    assert main(["fit", str(case), "--out", str(out)]) == 3
    assert main(["report", str(out)]) == 0
    html = (out / "report.html").read_text(encoding="utf-8")
    assert "infeasible" in html and "e54Cr" in html and "has no estimates" in html
    assert "None" not in html


# ----------------------------------------------------------------- compare, units, names
def _synthetic_posterior(folder: Path, elements: list[str], y: np.ndarray, shift: float,
                         rng: np.random.Generator, components_: list[str]) -> Path:
    """A sample folder whose model predicts every element at ``shift`` with scatter 0.3
    dex (Normal likelihood): a simulated truth for the PSIS-LOO comparison."""
    import arviz as az

    folder.mkdir(parents=True)
    mu = rng.normal(shift, 0.02, size=(2, 300, 1))
    ll = -0.5 * ((y[None, None, :] - mu) / 0.3) ** 2 - np.log(0.3 * np.sqrt(2 * np.pi))
    idata = az.from_dict(posterior={"m": mu[..., 0]}, log_likelihood={"y_obs": ll},
                         observed_data={"y_obs": y}, dims={"y_obs": ["elements"]},
                         coords={"elements": elements})
    idata.to_netcdf(str(folder / "posterior.nc"))
    (folder / "sample.json").write_text(
        '{"components": ' + str(components_).replace("'", '"') + ', "status": "passed"}')
    return folder


def test_compare_on_the_shared_elements_names_the_rest(tmp_path, capsys):
    rng = np.random.default_rng(7)
    els = ["Li", "Na", "K", "Cu", "Zn", "Ga", "Rb", "Cs", "Pb", "Sn"]
    y = rng.normal(0.0, 0.3, len(els))  # simulated observations around 0 dex
    good = _synthetic_posterior(tmp_path / "good", els, y, 0.0, rng, ["CI", "H"])
    # the same model fitted without Sn: indistinguishable on the shared elements
    twin = _synthetic_posterior(tmp_path / "twin", els[:-1], y[:-1], 0.01, rng, ["CI", "EH"])
    # a model offset by 0.6 dex (two sigma of the scatter): clearly worse
    bad = _synthetic_posterior(tmp_path / "bad", els, y, 0.6, rng, ["CV"])
    out = tmp_path / "cmp"
    assert main(["compare", str(good), str(twin), str(bad), "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "left out of" in printed and "Sn" in printed
    # units in the printed table's headers, every line within a 100-column terminal
    assert "elpd [nats]" in printed and "dse [nats]" in printed
    assert max(len(line) for line in printed.splitlines()) <= 100, [
        line for line in printed.splitlines() if len(line) > 100]
    table = pd.read_csv(out / "comparison.csv").set_index("components")
    assert table.loc["CV", "elpd_diff"] > 2 * table.loc["CV", "dse"]
    assert not table.loc["CV", "within_uncertainty"]
    assert table.loc["CI+EH", "within_uncertainty"] or table.loc["CI+H", "within_uncertainty"]
    assert "within its uncertainty" in " ".join(table["reading"].astype(str))
    meta = __import__("json").loads((out / "comparison.json").read_text())
    assert meta["left_out"] == {str(good): ["Sn"], str(bad): ["Sn"]}
    assert meta["provenance"]["planetmix_version"]
    assert main(["report", str(out)]) == 0
    html = (out / "report.html").read_text(encoding="utf-8")
    assert "left out of" in html and "planetmix ?" not in html
    assert "records no provenance" not in html and "holds no provenance" not in html


def test_trace_elements_in_ppm_or_ppb_and_majors_as_oxides():
    from inversion.report import mantle_trace_table

    # McDonough & Sun (1995) BSE: Na2O 0.36 wt%, Ir 3.2 ppb, Ga 4 ppm (from memory)
    planet = pd.DataFrame({"reservoir": ["mantle"] * 4,
                           "species": ["Na2O", "Ga2O3", "Ir", "MgO"],
                           "value": [0.36, 4.0e-4 * 1.3442, 0.0032, 37.8],
                           "unit": ["wt%", "wt%", "ppm", "wt%"]})
    t = mantle_trace_table(planet).set_index("element")
    assert set(t.index) == {"Ga", "Ir"}  # Na2O and MgO stay majors (oxide wt%)
    assert t.loc["Ga", "unit"] == "ppm"
    assert t.loc["Ga", "value"] == pytest.approx(4.0, rel=2e-3)  # Ga2O3/Ga2 = 1.3442
    assert t.loc["Ir", "unit"] == "ppb" and t.loc["Ir", "value"] == pytest.approx(3.2)


def test_report_names_parameters_as_users_know_them(result_folders):
    from inversion.report import _user_name, _user_parameters, _vol_label

    assert _vol_label("slope", "kinked") == "volatility slope [dex/K] (kinked)"
    assert _vol_label("T0", "kinked") == "pivot temperature T0 [K] (kinked)"
    assert "__" not in _user_name("T0_interval__")
    s = pd.DataFrame({"parameter": ["T0", "T0_interval__", "w_simplex__[0]", "slope"]})
    assert list(_user_parameters(s)["parameter"]) == ["T0", "slope"]
    assert main(["report", str(result_folders["rank"])]) == 0
    rank = (result_folders["rank"] / "report.html").read_text(encoding="utf-8")
    n = len(pd.read_csv(result_folders["rank"] / "ranking.csv"))
    assert f"best of {n} hypotheses" in rank and "weight CI" in rank


def test_report_sets_recovered_beside_the_stated_truth(tmp_path):
    """A simulated scenario (truth.json beside its case file): the report's table puts the
    stated truth beside the recovered numbers (here invented ones)."""
    import json

    from inversion.report import _truth_of, _truth_table

    (tmp_path / "case.toml").write_text("")
    (tmp_path / "truth.json").write_text(json.dumps({
        "weights": {"H": 0.5, "CV": 0.5}, "volatility": {"form": "kinked", "T0": 1300.0},
        "core_mass_fraction": 0.3}))
    truth = _truth_of({"case_file": str(tmp_path / "case.toml")})
    assert truth is not None and _truth_of({"case_file": str(tmp_path / "x" / "c")}) is None
    html = _truth_table(truth, {"weights": {"H": 0.45, "CV": 0.55},
                                "volatility": {"T0": {"median": 1310.0, "q05": 1290.0,
                                                      "q95": 1333.0}},
                                "core_mass_fraction": 0.31}, "posterior median")
    for text in ("weight of H", "0.45", "pivot temperature T0 [K]", "1310", "[1290, 1333]",
                 "core mass fraction", "0.31", "stated truth"):
        assert text in html, text


@pytest.mark.parametrize("name", [None, "sources", "elements", "isotopes", "solar", "EH"])
def test_library_output_fits_a_100_column_terminal(name, capsys):
    assert main(["library"] + ([name] if name else [])) == 0
    out = capsys.readouterr().out
    assert max(len(line) for line in out.splitlines()) <= 100
    if name == "sources":
        # every citation is there, wrapped rather than cut
        assert "Solar system abundances and condensation temperatures" in out.replace("\n    ",
                                                                                       " ")


def test_report_volatility_diagram_labels_apart_and_inside_the_page():
    from inversion.diagram import label_boxes

    fig = plots.volatility_diagram(_residuals(), reference="Mg",
                                   volatility={"form": "kinked", "T0": 1350.0,
                                               "slope": 0.006})
    fig.canvas.draw()
    boxes = label_boxes(fig)
    assert set(boxes) == set(_residuals()["element"])
    vals = list(boxes.values())
    for i, a in enumerate(vals):
        for b in vals[i + 1:]:
            assert not (a[0] < b[2] and b[0] < a[2] and a[1] < b[3] and b[1] < a[3])
    renderer = fig.canvas.get_renderer()
    for artist in [*fig.legends, *fig.axes[0].texts]:
        bb = artist.get_window_extent(renderer)
        assert fig.bbox.x0 - 1 <= bb.x0 and bb.x1 <= fig.bbox.x1 + 1, artist
    # the y range follows data and model (down to -1.3 dex); the steeper trend drawn here
    # (-4 dex at the coolest element) does not stretch it
    assert fig.axes[0].get_yscale() == "log"
    assert np.log10(fig.axes[0].get_ylim()[0]) > -2.0
    # a range of under two decades still carries several labelled ticks (1-2-5 steps)
    lo, hi = fig.axes[0].get_ylim()
    shown = [t for t, v in zip(fig.axes[0].get_yticklabels(), fig.axes[0].get_yticks(),
                               strict=True) if lo <= v <= hi and t.get_text()]
    assert len(shown) >= 4
    assert "Pb (" in " ".join(t.get_text() for t in fig.axes[0].texts)  # outlier with its z
    plots.plt.close(fig)


def test_cli_numbers_carry_units(result_folders):
    from inversion.cli import _interval_text, _ranking_text

    table = pd.read_csv(result_folders["rank"] / "ranking.csv")
    text = _ranking_text(table, "kinked")
    head = text.splitlines()[0]
    for col in ("T0 [K]", "slope [dex/K]", "late [% mantle]", "CMF"):
        assert col in head, col
    assert max(len(line) for line in text.splitlines()) <= 100
    best = table.iloc[0]
    assert f"{100 * best['late_accretion_fraction']:.3g}" in text.splitlines()[1]
    q = {"p2.5": 1287.4, "p97.5": 1321.2}
    assert _interval_text("volatility:T0", q, "kinked") == "T0 [1287, 1321] K"
    assert _interval_text("late_accretion_fraction", {"p2.5": 0.00346, "p97.5": 0.00428},
                          "kinked") == "late accretion [0.346, 0.428] % of the mantle"
    assert _interval_text("weight:CI", {"p2.5": 0.0, "p97.5": 1.1e-18},
                          "kinked") == "CI [0, 0]"
