"""Sampler benchmark: NUTS as planetmix runs it against a gradient-free ensemble sampler.

On one posterior (the McDonough & Sun 1995 bulk silicate Earth from four chondrite
groups, CI late veneer, kinked volatility), print the effective samples per second of

* NUTS (PyMC, 4 chains x 1000 draws after 1000 tuning, as ``planetmix sample`` runs it;
  sampling wall time after compilation, from the InferenceData ``sampling_time``), and
* emcee (affine-invariant ensemble, Goodman & Weare 2010) on the same log density (the
  PyMC model's compiled logp in its unconstrained space), walkers started in a small
  ball around the same convex optimum, first half discarded as burn-in,

and their ratio. ESS is the minimum over parameters: bulk ESS (ArviZ) for NUTS;
N / tau_int per parameter for emcee (emcee's integrated autocorrelation time, tol=0).

Run: ``.venv/bin/python benchmarks/bench_sampler.py [--emcee-steps N]``
"""

from __future__ import annotations

import argparse
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


def main() -> None:
    import arviz as az
    import emcee
    from pymc.blocking import DictToArrayBijection

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--emcee-steps", type=int, default=4000)
    ap.add_argument("--candidates", default="CI,CV,EH,H")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        p = compile_problem(load_case(bse_case(Path(tmp), args.candidates.split(","))))
    print(f"posterior: BSE_MS95 from {args.candidates} + CI late veneer; {p.n_fit} fitted "
          "elements")

    t0 = time.perf_counter()
    res = bayes.sample(p, bayes.SamplerSettings(draws=1000, tune=1000, chains=4, seed=1),
                       posterior_predictive=False, log_likelihood=False, progress=False)
    total = time.perf_counter() - t0
    t_sample = float(res.idata.posterior.attrs["sampling_time"])
    names = [n for n in res.idata.posterior.data_vars if n not in ("mu", "x", "cmf")]
    ess = az.ess(res.idata, var_names=names, method="bulk")
    ess_min = min(float(np.min(ess[n].values)) for n in names)
    ndim = sum(int(np.prod(res.idata.posterior[n].shape[2:])) for n in names)
    print(f"NUTS : 4 chains x 1000 draws (+1000 tune), {ndim} parameters: sampling "
          f"{t_sample:.1f} s after compilation ({total:.1f} s in all, with the convex start "
          f"and compilation); min bulk ESS {ess_min:.0f}; {ess_min / t_sample:.2f} ESS/s; "
          f"gate {'passed' if res.passed else 'FAILED'} (R-hat max "
          f"{res.diagnostics.rhat_max:.4f}, divergences {res.diagnostics.divergences})")

    model = bayes.build_model(p, res.priors)
    logp = model.compile_logp()
    ip = model.initial_point()
    # start from the same (transformed) optimum as NUTS chain 0
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
    t1 = time.perf_counter()
    sampler.run_mcmc(start, args.emcee_steps, progress=False)
    t_emcee = time.perf_counter() - t1
    chain = sampler.get_chain(discard=args.emcee_steps // 2)
    tau = emcee.autocorr.integrated_time(chain, tol=0)
    n = chain.shape[0] * chain.shape[1]
    ess_e = float(np.min(n / tau))
    print(f"emcee: {nwalkers} walkers x {args.emcee_steps} steps ({nd} parameters, "
          f"unconstrained space): {t_emcee:.1f} s; min ESS {ess_e:.1f} (max tau_int "
          f"{np.max(tau):.0f} steps; a chain shorter than ~50 tau underestimates tau); "
          f"{ess_e / t_emcee:.3f} ESS/s; acceptance {np.mean(sampler.acceptance_fraction):.2f}")
    print(f"ratio NUTS / emcee ESS/s: {(ess_min / t_sample) / (ess_e / t_emcee):.1f}")
    print(f"4-chain 1000-draw run of a {len(p.components)}-component case after compilation:"
          f" {t_sample:.1f} s (goal < 60 s)")


if __name__ == "__main__":
    main()
