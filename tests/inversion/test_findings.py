"""Findings: the class-independence test (simulated truths), reference element, normaliser,
Tc-table refusal, dropped elements and implausible-value warnings."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from inversion import compile_problem, load_case
from inversion.exceptions import InputError
from inversion.findings import class_test, findings
from inversion.fit import FitSettings, fit_problem
from inversion.model import forward
from inversion.solver import isotope_prediction
from inversion.volatility import SPLIT_FORM, log10_retained

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "case_studies" / "demo" / "orrin.toml"
EARTH = ROOT / "case_studies" / "earth" / "case.toml"
#: Settings of the simulated fits: no Laplace intervals for the common fit (not read).
COMMON = FitSettings(intervals=False)


def synthetic_body(p, w, vol, rng, *, offset=0.0, d_scatter_dex=0.0, sigma_dex=None, lam=0.003,
                   blocks="exact"):
    """A body made with one volatility trend (``offset`` = 0) or class-split slopes.

    True D are scattered by ``d_scatter_dex`` (log-normal) around the fitted ones; the
    elements get Normal noise ``sigma_dex`` (the problem's own sigma when None); the
    isotope observations are those of the true mixture plus noise at their stated sigma
    (keeping the Earth's or the demo's own values would contradict the true weights and
    force the fit into the isotope window). ``blocks``: ``"exact"`` makes the body from
    the library's mean blocks and fits it with them known exactly (``Q_sigma_dex`` None);
    ``"scattered"`` draws each block's ratios from their stated end-member uncertainty
    (``Q_sigma_dex``) and fits with that uncertainty in the variance, as a real body
    made of real chondrites would be fitted. Returns the problem with those observations.
    """
    D = p.D * 10.0 ** (rng.normal(0.0, d_scatter_dex, p.D.size) * (p.D > 0))
    pt = replace(p, volatility_form=SPLIT_FORM)
    if blocks == "scattered":
        pt = replace(pt, Q=p.Q * 10.0 ** (rng.normal(0.0, 1.0, p.Q.shape) * p.Q_sigma_dex))
    elif blocks != "exact":
        raise ValueError(f"blocks must be 'exact' or 'scattered', not {blocks!r}")
    f = forward(pt, np.asarray(w)[None], np.array([[vol[0], vol[1], offset]]), lam, D=D)
    mu = f["log10N"][0]
    v = float(f["v"][0])
    w = np.asarray(w, float)
    U = (np.concatenate([(1.0 - v) * w, [v]]) if p.late_name is not None else w)[None]
    iso = tuple({**d, "value": float(isotope_prediction(p, d, U)[0]
                                     + rng.normal(0.0, d["sigma"]))} for d in p.isotopes)
    fi = p.fit_index
    sig = p.sigma if sigma_dex is None else np.full(fi.size, sigma_dex)
    y_all = p.y_all.copy()
    s_all = p.sigma_all.copy()
    y_all[fi] = mu[fi] + rng.normal(0.0, sig)
    s_all[fi] = sig
    out = replace(p, y=y_all[fi], sigma=s_all[fi], y_all=y_all, sigma_all=s_all, isotopes=iso)
    return replace(out, Q_sigma_dex=None) if blocks == "exact" else out


def run_class_test(p):
    """Common fit then the nested test; returns the class-test record."""
    r = fit_problem(p, COMMON)
    return class_test(p, r)


def demo_problem():
    """Demo-like: the demo planet's elements and uncertainties on two of its true blocks
    (H, EH; truth.json has H 0.5, EH 0.3, CV 0.2)."""
    return compile_problem(load_case(DEMO)).subset(["H", "EH"])


def earth_problem():
    """An Earth-like problem: the McDonough & Sun (1995) element set on two blocks."""
    return compile_problem(load_case(EARTH)).subset(["CV", "EH"])


def test_split_form_needs_the_class_mask_and_reduces_to_kinked():
    tc = np.array([1500.0, 900.0, 700.0])
    th = np.array([[1300.0, 0.003]])
    same = log10_retained(SPLIT_FORM, np.array([[1300.0, 0.003, 0.0]]), tc,
                          metal=np.array([False, True, False]))
    assert np.allclose(same, log10_retained("kinked", th, tc))
    with pytest.raises(ValueError, match="class mask"):
        log10_retained(SPLIT_FORM, np.array([[1300.0, 0.003, 0.0]]), tc)


def test_class_test_null_and_power_few_replicates():
    """Simulated truth: one common trend with D scattered by 0.3 dex (no detection at
    3 sigma), and a 0.3 dex per 1000 K class difference on Earth-like 15% noise recovered
    within 3 stated sigma. The 50/30-replicate calibration is the slow test below."""
    rng = np.random.default_rng(11)
    p = demo_problem()
    for _ in range(2):
        body = synthetic_body(p, [0.55, 0.45], (1300.0, 0.003), rng, d_scatter_dex=0.3)
        c = run_class_test(body)
        assert c["status"] == "done"
        assert c["significance_sigma"] < 3.0, c
    pe = earth_problem()
    body = synthetic_body(pe, [0.5, 0.5], (1380.0, 0.0022), rng, offset=0.0003,
                          sigma_dex=np.log10(1.15))
    c = run_class_test(body)
    assert abs(c["slope_difference_dex_per_1000K"] - 0.3) <= 3 * c["uncertainty"], c


@pytest.mark.slow
@pytest.mark.parametrize("blocks", ["exact", "scattered"])
@pytest.mark.parametrize("kind", ["demo", "earth"])
def test_class_test_false_positive_rate_50_null_bodies(kind, blocks):
    """Issue 11 check: FPR at 3 sigma <= 5% on 50 one-trend bodies with D scattered by
    0.3 dex (measured 2026-12-02: 0.00 demo-like and Earth-like with exact blocks; 0.02
    and 0.00 with scattered blocks)."""
    rng = np.random.default_rng(2026 if kind == "demo" else 2027)
    if kind == "demo":
        p, w, vol, sig = demo_problem(), [0.55, 0.45], (1300.0, 0.003), None
    else:
        p, w, vol, sig = earth_problem(), [0.5, 0.5], (1380.0, 0.0022), np.log10(1.15)
    hits = sum(run_class_test(synthetic_body(p, w, vol, rng, d_scatter_dex=0.3,
                                             sigma_dex=sig, blocks=blocks))["differ"]
               for _ in range(50))
    assert hits / 50 <= 0.05


def _power_bodies(blocks, n=30):
    """The class tests of ``n`` Earth-like bodies (15% noise) with a true difference of
    +0.3 dex per 1000 K (one generator stream: the first 30 are the same for any n)."""
    rng = np.random.default_rng(2028)
    p = earth_problem()
    return [run_class_test(synthetic_body(p, [0.5, 0.5], (1380.0, 0.0022), rng,
                                          offset=0.0003, sigma_dex=np.log10(1.15),
                                          blocks=blocks)) for _ in range(n)]


@pytest.mark.slow
@pytest.mark.parametrize("blocks", ["exact", "scattered"])
def test_class_test_recovers_the_difference_within_its_stated_uncertainty(blocks):
    """Issue 11 check: the recovered difference lies within its stated uncertainty of the
    truth in >= 90% of 30 bodies; of a Normal error 68% lie within 1 sigma, so the check
    reads the stated uncertainty as the 95% interval (1.96 sigma). Measured 2026-12-02:
    100% (exact blocks, median +0.283 +- 0.076) and 93% (scattered, +0.285 +- 0.145)."""
    cs = _power_bodies(blocks)
    cover = sum(abs(c["slope_difference_dex_per_1000K"] - 0.3) <= 1.96 * c["uncertainty"]
                for c in cs)
    assert cover >= 27
    assert abs(np.median([c["slope_difference_dex_per_1000K"] for c in cs]) - 0.3) < 0.05


@pytest.mark.slow
def test_class_test_power_is_the_information_limit_200_bodies():
    """The detection rate of a 0.3 dex per 1000 K difference (Earth-like, 15% noise,
    blocks exact) is the power the data allow, and that power is >= 80%.

    With the stated 1-sigma u of each body, the likelihood-ratio statistic is
    noncentral chi2(1, (0.3/u)^2) and the 3-sigma test (LR >= 9) detects with
    probability ``ncx2.sf(9, 1, (0.3/u)^2)`` (common practice: the Wald/LR power of a
    Gaussian model). Checks: (a) the estimator is unbiased and efficient (the spread of
    the recovered differences equals the stated u within 15%: nothing is lost against
    the curvature's information); (b) that predicted power is >= 80%; (c) the observed
    rate agrees with it within 3 binomial standard errors. Measured 2026-12-02 on this
    stream: 158 of 200 detected (79.0%), predicted 81.8%, recovered +0.295 (sd 0.077)
    against a median stated u of 0.076; on another stream (seed 102) 173 of 200 (86.5%).
    """
    from scipy import stats

    cs = _power_bodies("exact", n=200)
    d = np.array([c["slope_difference_dex_per_1000K"] for c in cs])
    u = np.array([c["uncertainty"] for c in cs])
    assert abs(d.mean() - 0.3) < 3 * d.std(ddof=1) / np.sqrt(d.size)
    assert 0.85 < d.std(ddof=1) / np.median(u) < 1.15
    predicted = float(stats.ncx2.sf(stats.chi2.isf(2 * stats.norm.sf(3.0), 1), 1,
                                    (0.3 / u) ** 2).mean())
    assert predicted >= 0.80
    rate = float(np.mean([c["differ"] for c in cs]))
    assert abs(rate - predicted) <= 3 * np.sqrt(predicted * (1 - predicted) / d.size)


@pytest.mark.slow
@pytest.mark.xfail(strict=True, reason="measured 2026-12-02: detected 23 of 30 (77%) at "
                   "3 sigma with the blocks known exactly; the power the data allow is 82% "
                   "(stated 1-sigma 0.076 dex per 1000 K at 15% noise, 0.3 is 4.0 sigma; "
                   "test_class_test_power_is_the_information_limit_200_bodies), so 24 of 30 "
                   "is reached with probability 0.70 (binomial); 6 of 30 with the library's "
                   "end-member uncertainties (1-sigma 0.145)")
def test_class_test_power_30_earth_like_bodies():
    """Issue 11 check as written: 0.3 dex per 1000 K detected in >= 24 of 30 Earth-like
    bodies."""
    assert sum(c["differ"] for c in _power_bodies("exact")) >= 24


@pytest.mark.slow
def test_bse_mcdonough_sun_1995_one_trend():
    """The usual reading of the bulk silicate Earth: after core formation the moderately
    volatile elements follow one depletion trend whatever their class (McDonough & Sun
    1995, Chem. Geol. 120, 223, from memory; McDonough's core model derives the core from
    "a volatility curve for the Earth, based on the Primitive Mantle's lithophile element
    abundances", McDonough 2001, The composition of the Earth, in Teisseyre & Majewski
    (eds.), Earthquake Thermodynamics and Phase Transformations in the Earth's Interior).
    With those Earth-calibrated D the test is partly circular and should agree: measured
    2026-12-02 on the Earth case (CV 0.065 + EH 0.935), difference -0.09 +- 0.17 dex per
    1000 K, 0.5 sigma."""
    from inversion.findings import CLASS_TEST_SIGMA

    p = compile_problem(load_case(EARTH))
    c = class_test(p, fit_problem(p))
    assert c["significance_sigma"] < CLASS_TEST_SIGMA, c["statement"]
    assert abs(c["slope_difference_dex_per_1000K"]) < 2 * c["uncertainty"], c["statement"]


def _case(tmp_path, **target):
    """A copy of the demo case with [target] keys and table overridden."""
    src = DEMO.read_text()
    table = target.pop("table", str(DEMO.parent / "orrin_mantle.csv"))
    src = src.replace('table = "orrin_mantle.csv"', f'table = "{table}"')
    for k, v in target.items():
        if k == "condensation_table":
            src = src.replace('condensation_table = "lodders2003"',
                              f'condensation_table = "{v}"')
        elif k == "reference_element":
            src = src.replace('reference_element = "Mg"', f'reference_element = "{v}"')
        else:
            src = src.replace("[target]\n", f'[target]\n{k} = "{v}"\n')
    path = tmp_path / "case.toml"
    path.write_text(src)
    return path


def test_reference_element_outside_the_allowed_set_is_refused(tmp_path):
    with pytest.raises(InputError, match=r"refractory or main-component lithophile.*'Al'"):
        load_case(_case(tmp_path, reference_element="Cl"))
    with pytest.raises(InputError, match="lithophile"):
        load_case(_case(tmp_path, reference_element="K"))


def test_non_ci_normaliser_shifts_y_by_the_ratio_of_normalisers(tmp_path):
    import components

    p_ci = compile_problem(load_case(DEMO))
    p_cm = compile_problem(load_case(_case(tmp_path, normaliser="CM")))
    assert p_cm.normaliser == "CM"
    ci, cm = components.load("CI").composition, components.load("CM").composition
    both = np.isfinite(p_ci.y_all) & np.isfinite(p_cm.y_all)
    els = np.array(p_ci.elements)[both]
    expect = np.log10((ci[els] / ci["Mg"]) / (cm[els] / cm["Mg"])).to_numpy()
    assert both.sum() > 20
    assert np.allclose(p_cm.y_all[both] - p_ci.y_all[both], expect, atol=1e-12)


def test_incomplete_tc_table_is_refused_naming_elements(tmp_path):
    with pytest.raises(InputError, match=r"wood2019 \(15 elements\).*'Fe'"):
        load_case(_case(tmp_path, condensation_table="wood2019"))


def test_ppb_for_ppm_is_caught_and_nothing_leaves_silently(tmp_path):
    import pandas as pd

    df = pd.read_csv(DEMO.parent / "orrin_mantle.csv", comment="#")
    i = int(np.flatnonzero(df["element"] == "Sc")[0])
    assert df.loc[i, "unit"] == "ppm"
    df.loc[i, "unit"] = "ppb"  # the value read as ppb: 1000 times too small
    table = tmp_path / "mantle.csv"
    df.to_csv(table, index=False)
    case = load_case(_case(tmp_path, table=str(table)))
    p = compile_problem(case)
    hit = [d for d in p.implausible if d["element"] == "Sc"]
    assert len(hit) == 1 and "ppb given where ppm" in hit[0]["likely"]
    assert hit[0]["row"] == i + 2 and abs(hit[0]["offset_dex"] + 3.0) < 0.3
    assert not [d for d in compile_problem(load_case(DEMO)).implausible]
    target = set(case.target.composition.index)
    assert set(p.fit_elements) | {e for e, _ in p.dropped} == target
    assert dict(p.dropped)["Mg"].startswith("reference element")


def test_findings_report_class_and_onset_on_the_demo():
    p = compile_problem(load_case(DEMO))
    r = fit_problem(p, COMMON)
    f = findings(p, r, run_class_test=False)
    assert not f["volatility_onset"]["above_reference_tc"]
    assert all("geochemical_class" in o for o in f["off_trend"])
    # the reference element depleted: an onset far above Mg's Tc is flagged
    hot = replace(r, volatility={"T0": 1790.0, "slope": 0.003})
    assert findings(p, hot, run_class_test=False)["volatility_onset"]["above_reference_tc"]


@pytest.fixture(scope="module")
def cm_fit(tmp_path_factory):
    """The demo case normalised to CM, and its convex fit (no intervals)."""
    case = load_case(_case(tmp_path_factory.mktemp("cm"), normaliser="CM"))
    p = compile_problem(case)
    return case, p, fit_problem(p, COMMON)


def test_non_ci_normaliser_on_labels_findings_and_provenance(tmp_path, cm_fit):
    """The normaliser of the case reaches the provenance block, the diagram's y label,
    the report's caption and findings, and a diagram overlay drawn on another normaliser
    is refused (naming the fit's)."""
    import matplotlib.pyplot as plt

    from inversion import report
    from inversion.cli import _write_fit, main
    from inversion.output import case_provenance

    case, p, r = cm_fit
    prov = case_provenance(case, p)
    assert prov["normaliser"] == "CM" and "CM" in prov["components"]
    f = findings(p, r, run_class_test=False)
    assert f["refractory_lithophile_level"]["normaliser"] == "CM"
    out = tmp_path / "fit"
    _write_fit(out, case, p, r, f)
    rep = report._fit_report(out)
    (cap, make), = [(c, m) for t, c, m in rep.figures if t == "Volatility diagram"]
    assert "CM- and Mg-normalised" in cap
    fig = make()
    assert r"\mathrm{CM}" in fig.axes[0].get_ylabel()
    assert r"\mathrm{CI}" not in fig.axes[0].get_ylabel()
    plt.close(fig)
    assert any(" x CM " in line for line in rep.findings)
    assert main(["diagram", "CI", "--fit", str(out), "--out", str(tmp_path / "d.svg")]) == 2


def test_report_reads_the_class_test_entry_and_offers_case_forms_to_star_files(tmp_path,
                                                                                cm_fit):
    """report.py prints the class test's statement and circularity note (the findings
    entry ``class_independence``), the onset warning and the class of off-trend
    elements; a pattern file naming the nested-only split form is refused."""
    import json

    from inversion.report import _findings_lines
    from inversion.star import read_pattern

    _, p, r = cm_fit
    hot = replace(r, volatility={"T0": 1790.0, "slope": 0.003})
    f = findings(p, hot, run_class_test=False)
    # the report's words for an off-trend entry as findings() writes it
    f["off_trend"] = [{"element": "Zn", "z": 4.2, "offset_dex": 0.31, "fitted": True,
                       "direction": "above model", "geochemical_class": "chalcophile",
                       "basis": "residual after volatility, core formation and late "
                                "accretion"}]
    f["class_independence"] = {"status": "done", "statement": "consistent with one trend",
                               "lr_statistic": 0.5, "p_value": 0.48, "threshold_sigma": 3.0,
                               "circularity": "partly circular"}
    lines = _findings_lines(f)
    assert any("consistent with one trend" in x and "likelihood ratio" in x for x in lines)
    assert any("partly circular" in x for x in lines)
    assert any(x.startswith("Warning: the volatility onset lies above") for x in lines)
    assert any(x.startswith("Zn (chalcophile) lies above model by 0.31 dex (z = 4.2; "
                            "residual after volatility") for x in lines)
    path = tmp_path / "fit.json"
    path.write_text(json.dumps({"volatility": {"form": SPLIT_FORM, "T0": 1300.0,
                                               "slope": 0.003, "slope_offset": 0.0}}))
    with pytest.raises(InputError, match="volatility form") as e:
        read_pattern(path)
    offered = str(e.value).split("(got")[0]
    assert "'kinked'" in offered and SPLIT_FORM not in offered


def _regression_posterior(X, y, s, rng, names, chains=4, draws=250):
    """Exact posterior draws of a linear model y ~ N(X beta, s) under a flat prior, with
    the pointwise log-likelihood, as an InferenceData."""
    import arviz as az

    cov = s**2 * np.linalg.inv(X.T @ X)
    beta = np.linalg.solve(X.T @ X, X.T @ y)
    b = rng.multivariate_normal(beta, cov, size=(chains, draws))
    mu = b @ X.T
    ll = -0.5 * ((y - mu) / s) ** 2 - np.log(s * np.sqrt(2 * np.pi))
    return az.from_dict(posterior={n: b[..., j] for j, n in enumerate(names)},
                        log_likelihood={"y": ll}), b


@pytest.mark.filterwarnings("ignore:Estimated shape parameter of Pareto")
@pytest.mark.parametrize("offset", [0.0, 0.002])
def test_class_test_posterior_from_synthetic_inference_data(offset):
    """Simulated truth: abundances below a pivot fall with one slope or with an extra
    slope for the metal class. The posterior summary is that of the draws, and LOO
    prefers the split model only when the truth has a difference."""
    from inversion.findings import class_test_posterior

    rng = np.random.default_rng(4)
    n = 60
    x = rng.uniform(-600.0, 0.0, n)  # Tc - T0 [K]
    m = rng.random(n) < 0.5
    s = 0.05
    y = 0.002 * x + offset * x * m + rng.normal(0, s, n)
    common, _ = _regression_posterior(np.column_stack([x]), y, s, rng, ["slope"])
    split, b = _regression_posterior(np.column_stack([x, x * m]), y, s, rng,
                                     ["slope", "slope_offset"])
    c = class_test_posterior(common, split)
    d = c["slope_difference_dex_per_1000K"]
    assert d["mean"] == pytest.approx(1000 * b[..., 1].mean(), rel=1e-12)
    assert d["p5"] < 1000 * offset < d["p95"] or abs(d["mean"] - 1000 * offset) < 3 * d["sd"]
    if offset:
        assert c["prefers"] == "split" and c["loo"]["elpd_split_minus_common"] > 0
    else:
        assert c["prefers"] != "split"
    assert c["status"] == "computed from the two sampled posteriors"
