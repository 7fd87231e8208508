"""Sampler benchmark: NUTS as planetmix runs it against a gradient-free ensemble sampler.

On one posterior (the McDonough & Sun 1995 bulk silicate Earth from four chondrite
groups, CI late veneer, kinked volatility), print the effective samples per second of

* NUTS by nutpie on the JAX log density (engine nutpie: 4 chains x 1000 draws after 1000
  tuning; sampling wall time after compilation, compile time printed apart),
* optionally (``--with-pymc``) PyMC's own NUTS (engine pymc) on the same posterior, the
  engine planetmix used before, and
* emcee (affine-invariant ensemble, Goodman & Weare 2010) on the same log density,
  compiled the same way (JAX, through pytensor) so that the comparison is of the
  samplers and not of the compilers; walkers start in a small ball around the same
  convex optimum; the first half is discarded as burn-in,

and their ratios. ESS is the minimum over parameters: bulk ESS (ArviZ) for NUTS;
N / tau_int per parameter for emcee (emcee's integrated autocorrelation time). emcee's
chain is long enough for tau_int to be trusted (>= 50 tau after burn-in) by default; the
script says so when it is not.

Run: ``.venv/bin/python benchmarks/bench_sampler.py [--emcee-steps N] [--with-pymc]``
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

import components
from inversion import bayes
from inversion.case import load_case
from inversion.model import compile_problem

EARTH_EXCLUDE = ["S", "Se", "Te", "Pb", "In", "Cl", "Br", "I", "Tl", "Hg", "Cd", "B"]


def bse_case(folder: Path, candidates: list[str]) -> Path:
    """McDonough & Sun (1995) BSE target with the library's uncertainties."""
    bse = components.load("BSE_MS95")
    comp = bse.composition[bse.composition > 0]
    rel = (bse.uncertainty / bse.composition).fillna(0.15)[comp.index]
    pd.DataFrame({"element": comp.index, "value": comp.to_numpy() * 1e6, "unit": "ppm",
                  "uncertainty_pct": rel.to_numpy() * 100}).to_csv(folder / "target.csv",
                                                                    index=False)
    cands = ", ".join(f'"{c}"' for c in candidates)
    excl = ", ".join(f'"{e}"' for e in EARTH_EXCLUDE)
    (folder / "case.toml").write_text(f'''title = "BSE from {'+'.join(candidates)}"
[target]
table = "target.csv"
[building_blocks]
candidates = [{cands}]
[late_accretion]
component = "CI"
[elements]
exclude = [{excl}]
''')
    return folder / "case.toml"


def nuts_line(label: str, res, names: list[str]) -> float:
    """Print one NUTS engine's figures; return its ESS per second."""
    import arviz as az

    ess = az.ess(res.idata, var_names=names, method="bulk")
    ess_min = min(float(np.min(ess[n].values)) for n in names)
    t = res.timing["sampling_seconds"]
    extra = f", mass matrix {res.settings.mass_matrix}" if res.settings.engine == "nutpie" else ""
    print(f"{label}: 4 chains x 1000 draws (+1000 tune{extra}): sampling {t:.2f} s after "
          f"compilation (compile {res.timing['compile_seconds']:.1f} s); min bulk ESS "
          f"{ess_min:.0f}; {ess_min / t:.1f} ESS/s; gate "
          f"{'passed' if res.passed else 'FAILED'} (R-hat max {res.diagnostics.rhat_max:.4f},"
          f" divergences {res.diagnostics.divergences})")
    return ess_min / t


def main() -> None:
    import emcee
    from pymc.blocking import DictToArrayBijection

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--emcee-steps", type=int, default=30000)
    ap.add_argument("--candidates", default="CI,CV,EH,H")
    ap.add_argument("--with-pymc", action="store_true",
                    help="also time PyMC's own NUTS (about a minute more)")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        p = compile_problem(load_case(bse_case(Path(tmp), args.candidates.split(","))))
    print(f"posterior: BSE_MS95 from {args.candidates} + CI late veneer; {p.n_fit} fitted "
          "elements")

    settings = bayes.SamplerSettings(draws=1000, tune=1000, chains=4, seed=1, engine="nutpie")
    res = bayes.sample(p, settings, posterior_predictive=False, log_likelihood=False)
    model = bayes.build_model(p, res.priors)
    names = bayes.parameter_names(model)
    ndim = sum(int(np.prod(res.idata.posterior[n].shape[2:])) for n in names)
    print(f"{ndim} parameters")
    rate = nuts_line("NUTS (nutpie)", res, names)
    if args.with_pymc:
        from dataclasses import replace

        res_pm = bayes.sample(p, replace(settings, engine="pymc"),
                              posterior_predictive=False, log_likelihood=False)
        rate_pm = nuts_line("NUTS (PyMC) ", res_pm, names)
        print(f"ratio nutpie / PyMC NUTS ESS/s: {rate / rate_pm:.1f}")

    logp = model.compile_logp(mode="JAX")
    # start from the same (transformed) optimum as the NUTS chains
    init = res.start["initial_values"][0]
    with model:
        from pymc.initial_point import make_initial_point_fn

        fn = make_initial_point_fn(model=model, overrides=init, jitter_rvs=set())
        ip = fn(0)
    x0 = DictToArrayBijection.map(ip)
    nd = x0.data.size

    def lp(x: np.ndarray) -> float:
        v = logp(DictToArrayBijection.rmap(x0._replace(data=x), ip))
        return float(v) if np.isfinite(v) else -np.inf

    nwalkers = 2 * nd + 2
    rng = np.random.default_rng(2)
    start = x0.data[None, :] + 1e-3 * rng.normal(size=(nwalkers, nd))
    sampler = emcee.EnsembleSampler(nwalkers, nd, lp)
    lp(x0.data)  # JAX compiles on the first call: keep it out of the timing
    t1 = time.perf_counter()
    sampler.run_mcmc(start, args.emcee_steps, progress=False)
    t_emcee = time.perf_counter() - t1
    chain = sampler.get_chain(discard=args.emcee_steps // 2)
    tau = emcee.autocorr.integrated_time(chain, tol=0)
    n = chain.shape[0] * chain.shape[1]
    ess_e = float(np.min(n / tau))
    trusted = chain.shape[0] >= 50 * np.max(tau)
    caveat = ("" if trusted else ", under 50 tau: tau underestimated, ESS overestimated, "
              "so the ratio below is a lower bound")
    print(f"emcee: {nwalkers} walkers x {args.emcee_steps} steps ({nd} parameters, "
          f"unconstrained space, JAX log density): {t_emcee:.1f} s; min ESS {ess_e:.0f} "
          f"(max tau_int {np.max(tau):.0f} steps; kept chain = "
          f"{chain.shape[0] / np.max(tau):.0f} tau"
          f"{caveat}); "
          f"{ess_e / t_emcee:.2f} ESS/s; acceptance {np.mean(sampler.acceptance_fraction):.2f}")
    print(f"ratio NUTS (nutpie) / emcee ESS/s: {rate / (ess_e / t_emcee):.1f} (goal >= 20)")
    print(f"4-chain 1000-draw run of a {len(p.components)}-component case after compilation:"
          f" {res.timing['sampling_seconds']:.1f} s (goal < 60 s)")
    print(f"load average during the run: {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
