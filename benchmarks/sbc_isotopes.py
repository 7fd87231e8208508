"""Coverage of the Bayesian isotope fit: simulation-based calibration with isotopes.

The standard check of Talts et al. (2018, arXiv:1804.06788): every replicate draws all
parameters from the prior (:func:`inversion.bayes.draw_prior`), simulates the element
data from the numpy forward model and the Student-t likelihood
(:func:`inversion.bayes.simulate`) and the isotope anomalies from the model's isotope
balance with its widened variance (:func:`inversion.kernel.isotope_variance` at the
truth's weights and R-basis late weight ``v``: ``eps_obs ~ Normal(eps, sqrt(var))``),
then samples the posterior with nutpie on the model compiled once
(:class:`inversion.bayes._NutpieModel`; the element and isotope data are swapped per
replicate, ``runner.run(..., y=y, eps=eps)``) from the jittered convex optimum of the
replicate's own data. Per parameter it records the rank of the truth among ``L = 99``
thinned posterior draws and whether the central 90% interval covers it; the predicted
anomalies ``eps_pred`` (functions of the parameters, so their ranks are uniform too) are
checked beside the parameters. If the sampler's isotope term differed from the
likelihood the data were simulated from, the isotope-constrained quantities (the weights,
``lam``, ``eps_pred``) would be covered more or less often than 90% and their rank
histograms would not be flat.

The invented scenario: CI + EH with a CI late component, the elements of
tests/inversion/test_bayes.py at 10 % of the BSE (McDonough & Sun 1995), e54Cr and e50Ti
as isotope systems (observation sigma 0.08; the case's observed values only set up the
problem, the replicates replace them). Prints per parameter the chi-square p-value of
the rank histogram (``--bins`` bins) against uniform and the 90% coverage, the pooled
coverage and whether it lies in 85-95%; writes one row per replicate and parameter to
``--out`` (after every replicate, so an interrupted run keeps its rows).

Run: ``nice -n 5 .venv/bin/python benchmarks/sbc_isotopes.py [--replicates 100]``.

Measured (2-core machine shared with other jobs; ``nice -n 5 ... --replicates 100
--cores 2``, 2 chains x 300 draws after 300 tuning steps, seed 0): compile 2-10 s once,
then 6-17 s per replicate (convex start under 1 s), 964 s for 100 replicates (the
script before recompiled the model for every replicate, about 80 s each). No divergent
transition in any replicate; 2 of 100 replicates started from the fit without isotope
windows (their simulated anomalies left the convex fit infeasible). Rank-histogram
chi-square p-value (10 bins of the ranks 0..99) and 90% coverage over the 100 truths:

=================  ======  =======
parameter          chi2 p  cover90
=================  ======  =======
tau                0.103   0.93
T0                 0.999   0.92
slope              0.911   0.92
lam                0.679   0.91
w[CI], w[EH]       0.798   0.89
eps_pred[e54Cr]    0.834   0.89
eps_pred[e50Ti]    0.834   0.89
=================  ======  =======

The 27 partitioned log10 D: p-values 0.046 (Se) to 0.883 (V), coverage 0.82 (V) to
0.95 (Cu).

Pooled coverage: 0.896 over all 35 quantities (33 parameters and the 2 predicted
anomalies), 0.894 over the isotope-constrained ones (w, lam, eps_pred); both inside
85-95%. One p-value below 0.05 (0.046) among 35 histograms is fewer than the 1.75 that
uniform ranks give on average. The two eps_pred ranks coincide because
both anomalies rise with the CI share; they are not independent checks of each other.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import stats

import components
from inversion import bayes, kernel
from inversion.case import load_case
from inversion.fit import fit_problem
from inversion.model import Problem, compile_problem, forward
from inversion.volatility import get_form

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from tests.inversion.test_bayes import ELEMENTS, write_case  # noqa: E402

ISOTOPES = "[isotopes]\ne54Cr = [0.30, 0.08]\ne50Ti = [0.20, 0.08]\n"
THIN_TO = 99


def _D_of(p: Problem, truth: dict) -> np.ndarray:
    D = np.asarray(p.D, float).copy()
    part = bayes._partitioned(p)
    if part:
        D[part] = 10.0 ** np.asarray(truth["log10D"])
    return D


def simulate_isotopes(p: Problem, truth: dict, rng: np.random.Generator
                      ) -> tuple[np.ndarray, np.ndarray]:
    """Noise-free anomalies of the truth and observations drawn around them.

    ``eps, var = kernel.isotope_variance(np, iso, w, v)`` with ``v`` the R-basis late
    weight of the truth (numpy forward model); ``eps_obs ~ Normal(eps, sqrt(var))``.
    """
    K = len(p.components)
    w = np.asarray(truth.get("w", np.ones(K)), float)
    vol = np.array([truth[n] for n in get_form(p.volatility_form).params])
    v = float(forward(p, w[None], vol[None], truth.get("lam", 0.0), D=_D_of(p, truth))
              ["v"][0])
    eps = np.zeros(len(p.isotopes))
    var = np.zeros(len(p.isotopes))
    for j, iso in enumerate(p.isotopes):
        e, s2 = kernel.isotope_variance(np, iso, w, v)
        eps[j], var[j] = float(e), float(s2)
    return eps, eps + np.sqrt(var) * rng.standard_normal(eps.size)


def _start_fit(p: Problem, y: np.ndarray, eps_obs: np.ndarray):
    """Convex optimum of the replicate's data (elements and isotopes); without the
    isotope windows when they leave no feasible mixture (the start only)."""
    iso = [{**d, "value": float(e)} for d, e in zip(p.isotopes, eps_obs, strict=True)]
    q = bayes._with_y(replace(p, isotopes=iso), y)
    try:
        fit = fit_problem(q)
        if fit.feasible:
            return fit, True
    except Exception:  # noqa: BLE001 -- an infeasible start falls back below
        pass
    return fit_problem(bayes._with_y(replace(p, isotopes=[]), y)), False


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--replicates", type=int, default=100)
    ap.add_argument("--draws", type=int, default=300)
    ap.add_argument("--tune", type=int, default=300)
    ap.add_argument("--chains", type=int, default=2)
    ap.add_argument("--cores", type=int, default=1, help="threads for the chains")
    ap.add_argument("--bins", type=int, default=10)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--out", default="sbc_isotopes.csv")
    ap.add_argument("--max-seconds", type=float, default=None,
                    help="stop starting replicates after this many seconds")
    ap.add_argument("--report", default=None, metavar="CSV",
                    help="only print the summary of an earlier run's rows")
    args = ap.parse_args()
    if args.report:
        report(pd.read_csv(args.report), args.bins)
        return
    bse = components.load("BSE_MS95").composition
    with tempfile.TemporaryDirectory() as tmp:
        p = compile_problem(load_case(write_case(Path(tmp), bse[ELEMENTS],
                                                 candidates=["CI", "EH"], extra=ISOTOPES)))
    priors = bayes.default_priors(p)
    t0 = time.perf_counter()
    runner = bayes._NutpieModel.build(bayes.build_model(p, priors))
    print(f"compiled once: {runner.compile_seconds:.0f} s", flush=True)
    settings = bayes.SamplerSettings(draws=args.draws, tune=args.tune, chains=args.chains,
                                     seed=args.seed, engine="nutpie", cores=args.cores)
    rng = np.random.default_rng(args.seed)
    names = get_form(p.volatility_form).params
    iso_names = [d["name"] for d in p.isotopes]
    rows = []
    for r in range(args.replicates):
        if args.max_seconds is not None and time.perf_counter() - t0 > args.max_seconds:
            print(f"time budget reached after {r} replicates")
            break
        t_r = time.perf_counter()
        truth = bayes.draw_prior(p, priors, rng)
        y = bayes.simulate(p, truth, rng)
        eps_true, eps_obs = simulate_isotopes(p, truth, rng)
        fit, iso_start = _start_fit(p, y, eps_obs)
        t_fit = time.perf_counter() - t_r
        idata, _, t_nuts = runner.run(p, priors, fit, settings, cores=args.cores,
                                 seed=int(rng.integers(2**31 - 1)),
                                 jitter_seed=int(rng.integers(2**31 - 1)),
                                 progress=False, y=y, eps=eps_obs)
        post = bayes.posterior_arrays(p, idata)
        div = int(idata.sample_stats["diverging"].values.sum())
        flat = {"tau": post["tau"]}
        flat.update({n: post["vol"][:, j] for j, n in enumerate(names)})
        if p.late_name is not None:
            flat["lam"] = post["lam"]
        flat.update({f"w[{c}]": post["w"][:, k] for k, c in enumerate(p.components)})
        for j in bayes._partitioned(p):
            flat[f"log10D[{p.elements[j]}]"] = np.log10(post["D"][:, j])
        eps_post = np.asarray(idata.posterior["eps_pred"].values, float).reshape(
            -1, len(iso_names))
        flat.update({f"eps_pred[{n}]": eps_post[:, j] for j, n in enumerate(iso_names)})
        true = bayes._flat_truth(truth, p)
        true.update({f"eps_pred[{n}]": float(eps_true[j]) for j, n in enumerate(iso_names)})
        S = flat["tau"].size
        idx = np.linspace(0, S - 1, THIN_TO).round().astype(int)
        order = rng.permutation(S)
        for name, v in flat.items():
            t = true[name]
            lo, hi = np.quantile(v, [0.05, 0.95])
            rows.append({"replicate": r, "parameter": name, "truth": t,
                         "rank": int(np.sum(v[order][idx] < t)),
                         "covered90": bool(lo <= t <= hi), "divergences": div,
                         "isotope_start": iso_start,
                         **{f"eps_obs[{n}]": float(eps_obs[j])
                            for j, n in enumerate(iso_names)}})
        pd.DataFrame(rows).to_csv(args.out, index=False)
        print(f"replicate {r + 1}/{args.replicates}: {time.perf_counter() - t_r:.0f} s "
              f"(fit {t_fit:.0f} s, NUTS {t_nuts:.0f} s; total "
              f"{time.perf_counter() - t0:.0f} s), divergences {div}", flush=True)
    report(pd.DataFrame(rows), args.bins)


def report(table: pd.DataFrame, bins: int) -> None:
    """Print the rank-histogram p-values, the coverages and the pooled verdict."""
    n = table["replicate"].nunique()
    print(f"{n} replicates, ranks among {THIN_TO} thinned draws, {bins} bins")
    print(f"{'parameter':<18} {'chi2 p':>8} {'cover90':>8}")
    for name, g in table.groupby("parameter", sort=False):
        counts = np.histogram(g["rank"], bins=bins, range=(0, THIN_TO + 1))[0]
        print(f"{name:<18} {stats.chisquare(counts).pvalue:8.3f} "
              f"{g['covered90'].mean():8.2f}")
    pooled = table["covered90"].mean()
    iso = table[table["parameter"].str.startswith(("w[", "lam", "eps_pred["))]
    for label, val in (("all parameters", pooled),
                       ("isotope-constrained (w, lam, eps_pred)", iso["covered90"].mean())):
        print(f"pooled coverage, {label}: {val:.3f} "
              f"({'inside' if 0.85 <= val <= 0.95 else 'OUTSIDE'} 0.85-0.95)")
    reps = table.groupby("replicate")
    print(f"replicates with divergences: {int((reps['divergences'].first() > 0).sum())}; "
          f"starts without isotope windows (infeasible convex fit): "
          f"{int((~reps['isotope_start'].first()).sum())}")


if __name__ == "__main__":
    main()
