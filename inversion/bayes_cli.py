"""``planetmix sample`` and ``planetmix compare``: the Bayesian commands.

``sample`` writes ``posterior.nc``, ``summary.csv``, ``planet_draws.parquet``,
``outliers.csv``, ``diagnostics.json`` and ``sample.json`` into the result folder
(atomically) and exits 4 when the diagnostics gate fails (the results are still written,
marked as failing). ``compare`` ranks result folders of the same target by PSIS-LOO.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

from .cli import EXIT_GATE, EXIT_OK, register
from .exceptions import InputError

__all__ = ["write_sample", "read_run"]


def write_sample(out: Path, case: Any, p: Any, result: Any,
                 extra: dict[str, Any] | None = None) -> dict[str, Any]:
    """Write every output of a sampling run into ``out``; return the ``sample.json`` data
    (``extra`` entries are added to it)."""
    from dataclasses import asdict

    from .bayes import (
        main_parameters,
        outliers,
        posterior_planet,
        summary_table,
    )
    from .handoff import write_handoff
    from .output import atomic_folder, case_provenance, write_json

    idata = result.idata
    names = [n for n in idata.posterior.data_vars if n not in ("mu", "eps_pred")]
    free = [n for n in names if n not in ("x", "cmf")]
    planet, handoff = posterior_planet(p, idata, planet_mass_kg=case.target.planet_mass_kg)
    table = summary_table(idata, names)
    outl = outliers(p, idata)
    diag = result.diagnostics.to_dict()
    status = "passed" if result.passed else "failed diagnostics gate"
    data = {
        "title": case.title,
        "status": status,
        "gate_messages": result.diagnostics.messages(),
        "components": list(p.components),
        "weights_basis": f"{p.reference} (reference-element) basis",
        "late_accretion_component": p.late_name,
        "fit_elements": p.fit_elements,
        "parameters": free,
        "posterior": main_parameters(p, idata, planet),
        "log_marginal_likelihood": result.log_marginal_likelihood,
        "smc": result.smc,
        "settings": asdict(result.settings),
        "seeds": result.seeds,
        "start": result.start,
        "priors": result.priors,
        "likelihood": {"elements": "StudentT(nu=4, mu, sqrt(sigma^2 + tau^2))",
                       "isotopes": "Normal(eps_pred, sigma_obs)"},
        "timing_seconds": result.timing,
        "off_trend": [{k: (v.item() if hasattr(v, "item") else v) for k, v in r.items()}
                      for r in outl[["element", "class", "residual_dex", "direction", "z",
                                     "tail_probability"]].to_dict("records")],
        "diagnostics": diag,
        "notes": list(p.notes),
        "provenance": case_provenance(case, p, tables=["vehtari2021"], extra={
            "sampler": _SAMPLER_TEXT[result.settings.engine]}),
        **(extra or {}),
    }
    with atomic_folder(out) as tmp:
        result.idata.to_netcdf(str(tmp / "posterior.nc"))
        table.to_csv(tmp / "summary.csv", index=False)
        planet.to_parquet(tmp / "planet_draws.parquet", index=False)
        outl.to_csv(tmp / "outliers.csv", index=False)
        write_json(tmp / "diagnostics.json", {**diag, "status": status})
        write_json(tmp / "sample.json", data)
        # the interior-model hand-off (docs/handoff.md); per-draw rows are in the parquet
        write_handoff(tmp, handoff, draws_csv=False, meta={
            "title": case.title, "method": "Bayesian posterior (NUTS); intervals are "
            "posterior quantiles", "status": status, "components": list(p.components),
            "posterior_draws": len(planet), "provenance": data["provenance"]})
    return data


_SAMPLER_TEXT = {
    "nutpie": "NUTS by nutpie (log density and gradient compiled with JAX; the physics "
              "is inversion.kernel), chains started from the convex optimum (jittered)",
    "numpyro": "NUTS by NumPyro on the same JAX log density (the whole sampler compiled "
               "by XLA, chains in parallel threads), chains started from the convex optimum "
               "(jittered)",
    "pymc": "NUTS by PyMC (log density compiled through pytensor's C backend), chains "
            "started from the convex optimum (jittered)",
}


def _fmt(d: dict[str, float], scale: float = 1.0, spec: str = ".4g") -> str:
    return (f"{d['median'] * scale:{spec}} [{d['q05'] * scale:{spec}}, "
            f"{d['q95'] * scale:{spec}}]")


def _comparison_text(table: Any) -> str:
    """The comparison table as printed: units in the headers, within 100 columns (the
    elements with a high Pareto k are named in the readings below it)."""
    import pandas as pd

    show = pd.DataFrame({
        "rank": table["rank"], "components": table["components"],
        "elpd [nats]": table["elpd_loo"].map(lambda v: f"{v:.2f}"),
        "p_loo": table["p_loo"].map(lambda v: f"{v:.1f}"),
        "Δelpd [nats]": table["elpd_diff"].map(lambda v: f"{v:.2f}"),
        "dse [nats]": table["dse"].map(lambda v: f"{v:.2f}"),
        "weight": table["weight"].map(lambda v: f"{v:.3f}"),
        "within 2 dse": table["within_uncertainty"].map(lambda v: "yes" if v else "no"),
        "max Pareto k": table["pareto_k_max"].map(lambda v: f"{v:.2f}"),
        "gate": table["gate"].map(lambda v: "passed" if v == "passed" else "FAILED")})
    if "log10_bayes_factor_vs_best" in table:
        show["log10 BF vs best"] = table["log10_bayes_factor_vs_best"].map(
            lambda v: "n/a" if v is None or v != v else f"{v:.2f}")
    return show.to_string(index=False, line_width=100)


@register("sample", "sample the posterior of a case with NUTS (PyMC) and gate it")
def _sample(parser: argparse.ArgumentParser):
    parser.add_argument("case", help="case file (TOML)")
    parser.add_argument("--out", required=True, help="result folder")
    parser.add_argument("--draws", type=int, default=None, help="kept draws per chain "
                        "(default: [sampler] draws, else 1000)")
    parser.add_argument("--tune", type=int, default=None, help="tuning draws per chain "
                        "(default: [sampler] tune, else 1000)")
    parser.add_argument("--chains", type=int, default=None,
                        help="chains (default: [sampler] chains, else 4)")
    parser.add_argument("--seed", type=int, default=None,
                        help="random seed (default: [sampler] seed, else 0)")
    parser.add_argument("--cores", type=int, default=None,
                        help="processes for the chains (default: min(chains, CPUs))")
    parser.add_argument("--engine", default=None, choices=["nutpie", "numpyro", "pymc"],
                        help="NUTS implementation (default: [sampler] engine, else numpyro, "
                        "the whole sampler compiled by XLA; nutpie: nutpie on the same JAX log "
                        "density; pymc: PyMC's own, slowest per draw)")
    parser.add_argument("--evidence", action="store_true",
                        help="also run sequential Monte Carlo for the log marginal likelihood")
    parser.add_argument("--class-test", action="store_true",
                        help="also sample the class-split volatility model (a separate "
                        "slope for the chalcophile and siderophile elements) and compare "
                        "it with the common trend: posterior of the slope difference and "
                        "LOO (kinked form only; doubles the sampling time)")
    parser.add_argument("--quiet", action="store_true", help="no progress display")

    def run(args: argparse.Namespace) -> int:
        from .bayes import check_priors, check_sampler_settings, sample
        from .case import load_case
        from .model import compile_problem

        case = load_case(args.case)
        if case.core.partitioning == "single-stage":
            # conditions given as [low, high] are parameters; the sampler starts at the
            # convex fit's conditions and holds the metal at its converged state
            from dataclasses import replace

            from .conditions import free_conditions, sampling_start, start_problem

            if not args.quiet:
                print("convex fit at the core-formation conditions (the sampler's start "
                      "and its held metal) ...", file=sys.stderr, flush=True)
            p, fit0 = sampling_start(start_problem(case), case)
            if "pressure_GPa" in free_conditions(case):
                p = replace(p, core_conditions={
                    **p.core_conditions,
                    "pressure_range_GPa": list(free_conditions(case)["pressure_GPa"])})
        else:
            p, fit0 = compile_problem(case), None
        priors = check_priors(p, case.priors, file=case.path)
        settings = check_sampler_settings(case.sampler, file=case.path, draws=args.draws,
                                          tune=args.tune, chains=args.chains, seed=args.seed,
                                          cores=args.cores, engine=args.engine,
                                          evidence=args.evidence or None)
        if args.class_test and p.volatility_form != "kinked":
            raise InputError("the Bayesian class test compares the kinked form with its "
                             "class-split twin; this case uses the "
                             f"{p.volatility_form!r} form", file=case.path,
                             field="volatility.form", value=p.volatility_form)
        result = sample(p, settings, priors=priors, fit=fit0, progress=not args.quiet)
        extra: dict[str, Any] = {}
        if args.class_test:
            extra["class_test"] = _class_test(p, settings, priors, result,
                                              progress=not args.quiet)
        if p.core_conditions:
            extra["core_conditions"] = _posterior_conditions(p, result.idata)
        data = write_sample(Path(args.out), case, p, result, extra or None)
        post = data["posterior"]
        t = result.timing
        print(f"{case.title}: {'+'.join(p.components)}, {settings.chains} chains x "
              f"{settings.draws} draws (seed {settings.seed}, {settings.engine})")
        print(f"  time: compile {t['compile_seconds']:.1f} s, sampling "
              f"{t['sampling_seconds']:.1f} s" + (
                  f" ({t['sampler_program_seconds']:.1f} s preparing the sampler's program, "
                  f"{t['chains_seconds']:.1f} s the chains)"
                  if "sampler_program_seconds" in t else ""))
        print("  weights (" + p.reference + " basis, median [5%, 95%]): " + "; ".join(
            f"{k} {_fmt(v, spec='.3f')}" for k, v in post["weights"].items()))
        from .cli import _unit

        print(f"  volatility ({p.volatility_form}): " + "; ".join(
            f"{k} {_fmt(v)}{_unit(p.volatility_form, k)}" for k, v in post["volatility"].items()
            if k != "form"))
        if "late_accretion_fraction" in post:
            print(f"  late accretion: {_fmt(post['late_accretion_fraction'], 100, '.3f')} % of "
                  f"the mantle, {_fmt(post['late_accretion_planet_fraction'], 100, '.3f')} %"
                  " of the planet")
        print(f"  core mass fraction {_fmt(post['core_mass_fraction'], spec='.3f')}; "
              f"model scatter tau {_fmt(post['tau_dex'], spec='.3f')} dex")
        if data["log_marginal_likelihood"] is not None:
            print(f"  log marginal likelihood (SMC): {data['log_marginal_likelihood']:.2f}")
        d = data["diagnostics"]
        print(f"  diagnostics [Vehtari et al. 2021]: R-hat max {d['rhat_max']:.4f} (<= "
              f"{d['thresholds']['rhat_max']}),")
        print(f"    bulk ESS min {d['ess_bulk_min']:.0f} (>= "
              f"{d['thresholds']['ess_bulk_min']:.0f}), divergences {d['divergences']}")
        for row in data.get("off_trend", [])[:8]:
            print(f"  off trend: {row['element']} ({row['class']}) lies "
                  f"{abs(row['residual_dex']):.2f} dex {row['direction']} (z = "
                  f"{row['z']:+.1f}; posterior-predictive p = {row['tail_probability']:.2g})")
        print(f"  written to {args.out}/:")
        print("    posterior.nc, summary.csv, planet_draws.parquet, outliers.csv, "
              "diagnostics.json,")
        print("    sample.json, planet.json (hand-off)")
        if "class_test" in extra:
            print(f"  class test (Bayesian): {extra['class_test']['statement']}")
        cc = extra.get("core_conditions", {})
        units = {"pressure_GPa": ("equilibration pressure", " GPa", ".1f"),
                 "temperature_K": ("temperature", " K", ".0f"), "dIW": ("dIW", "", ".2f")}
        parts = [f"{lab} {_fmt(cc[k], spec=f)}{u} (prior {cc[k]['range']})"
                 for k, (lab, u, f) in units.items()
                 if isinstance(cc.get(k), dict) and "range" in cc[k]]
        if parts:
            print("  core formation: " + "; ".join(parts) + f"; {cc['sampled']}")
        if not result.passed:
            print("  DIAGNOSTICS GATE FAILED; results are marked as failing:")
            for m in result.diagnostics.messages():
                print("    " + m)
            return EXIT_GATE
        return EXIT_OK

    return run


def _posterior_conditions(p: Any, idata: Any) -> dict[str, Any]:
    """The ``core_conditions`` block of a sample: the case's conditions and, when the
    pressure was sampled, its posterior (median and 5-95%) and the liquidus temperature
    it implies."""
    import numpy as np

    from .jaxmodel import condition_ranges

    cc = dict(p.core_conditions)
    post = idata.posterior
    sampled = [k for k in condition_ranges(p) if k in post]
    for k in sampled:
        v = np.asarray(post[k], float).ravel()
        q = np.percentile(v, [50.0, 5.0, 95.0])
        cc[k] = {"median": float(q[0]), "q05": float(q[1]), "q95": float(q[2]),
                 "prior": "Uniform", "range": list(condition_ranges(p)[k])}
    if len(sampled) > 1:
        # posterior correlations of the sampled conditions (their degeneracy)
        X = np.stack([np.asarray(post[k], float).ravel() for k in sampled])
        cc["posterior_correlation"] = {"names": sampled,
                                       "matrix": np.round(np.corrcoef(X), 4).tolist()}
    if "pressure_GPa" in sampled and "temperature_K" not in sampled:
        P = np.asarray(post["pressure_GPa"], float).ravel()
        if "liquidus" in str(cc.get("temperature_from", "")).lower():
            from .partitioning import peridotite_liquidus

            T = peridotite_liquidus(P)
            t = np.percentile(T, [50.0, 5.0, 95.0])
            cc["temperature_K"] = {"median": float(t[0]), "q05": float(t[1]),
                                   "q95": float(t[2])}
    if sampled:
        held = [k for k in ("temperature_K", "dIW") if k not in sampled]
        cc["sampled"] = (", ".join(sampled) + " (Uniform priors over the case's ranges); "
                         + (" and ".join(held) + " as the case gives them; " if held else "")
                         + ("the mean molar masses and the metal's Si and S held at the "
                            "convex fit's values" if cc.get("metal_held_from") else
                            "the mean molar masses held at their start values"))
    return cc


def _class_test(p: Any, settings: Any, priors: dict[str, Any], result: Any, *,
                progress: bool) -> dict[str, Any]:
    """Sample the class-split twin of ``p`` with the same settings and seed and compare
    it with the common-trend run (:func:`inversion.findings.class_test_posterior`)."""
    from dataclasses import replace

    from .bayes import OBS_ELEMENTS, default_priors, sample
    from .findings import class_test_posterior
    from .volatility import SPLIT_FORM

    ps = replace(p, volatility_form=SPLIT_FORM)
    pri = default_priors(ps)
    pri.update({k: v for k, v in priors.items() if k in pri})
    split = sample(ps, settings, priors=pri, progress=progress)
    out = class_test_posterior(result.idata, split.idata, var_name=OBS_ELEMENTS)
    out["split_diagnostics"] = split.diagnostics.to_dict()
    out["split_priors"] = pri
    if not split.passed:
        out["statement"] += " (the class-split run failed the diagnostics gate)"
    return out


def read_run(folder: str | Path) -> tuple[Any, dict[str, Any]]:
    """Read a ``sample`` result folder: the InferenceData and ``sample.json``."""
    import arviz as az

    folder = Path(folder)
    nc = folder / "posterior.nc"
    js = folder / "sample.json"
    if not nc.exists() or not js.exists():
        raise InputError("not a sample result folder (needs posterior.nc and sample.json)",
                         file=str(folder))
    meta = json.loads(js.read_text(encoding="utf-8"))
    return az.from_netcdf(str(nc)), meta


@register("compare", "rank sample results of the same target by PSIS-LOO")
def _compare(parser: argparse.ArgumentParser):
    parser.add_argument("dirs", nargs="+", metavar="DIR", help="result folders of sample")
    parser.add_argument("--out", default=None, help="folder for comparison.csv")

    def run(args: argparse.Namespace) -> int:
        import math

        from .bayes import compare_runs
        from .output import atomic_folder

        idatas, evidence, gate = {}, {}, {}
        for d in args.dirs:
            idata, meta = read_run(d)
            label = str(d)
            if label in idatas:
                raise InputError("a folder is listed twice", field="DIR", value=label)
            idatas[label] = idata
            evidence[label] = meta.get("log_marginal_likelihood")
            gate[label] = meta.get("status")
        table = compare_runs(idatas, evidence=evidence if any(
            v is not None for v in evidence.values()) else None)
        table.insert(1, "components", [
            "+".join(json.loads((Path(r) / "sample.json").read_text())["components"])
            for r in table["run"]])
        table["gate"] = [gate[r] for r in table["run"]]
        cols = ["rank", "run", "components", "elpd_loo", "p_loo", "elpd_diff", "dse",
                "weight", "warning", "gate"]
        if "log_marginal_likelihood" in table:
            cols += ["log_marginal_likelihood", "log10_bayes_factor_vs_best"]
        cols += ["within_uncertainty", "pareto_k_max", "pareto_k_high", "reading"]
        attrs = dict(table.attrs)
        table = table[cols]
        print(_comparison_text(table))
        import textwrap

        def say(text: str) -> None:  # prose wrapped to a 100-column terminal
            print(textwrap.fill(text, width=100, initial_indent="  ",
                                subsequent_indent="    "))

        for _, r in table.iterrows():
            say(f"{r['components']} ({r['run']}): {r['reading']}")
        for label, els in attrs.get("left_out", {}).items():
            say(f"compared on the {len(attrs['shared_elements'])} shared elements; "
                f"left out of {label}: {', '.join(els)}")
        if table["pareto_k_high"].astype(bool).any():
            say(attrs["pareto_k_advice"])
        if "log10_bayes_factor_vs_best" in table:
            for _, r in table.iloc[1:].iterrows():
                bf = r["log10_bayes_factor_vs_best"]
                if bf is not None and not (isinstance(bf, float) and math.isnan(bf)):
                    print(f"  Bayes factor {table.iloc[0]['run']} : {r['run']} = "
                          f"10^{-bf:.2f}")
        if args.out:
            from .output import provenance, write_json

            with atomic_folder(args.out) as tmp:
                table.to_csv(tmp / "comparison.csv", index=False)
                write_json(tmp / "comparison.json", {
                    "runs": list(table["run"]), **attrs,
                    "provenance": provenance(tables=[], extra={"compared_folders": list(
                        table["run"]), "criterion": "PSIS-LOO (elpd), arviz.compare"})})
            print(f"written to {args.out}/comparison.csv")
        return EXIT_OK

    return run
