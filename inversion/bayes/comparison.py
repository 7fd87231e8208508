"""Model comparison of sampled runs (LOO, with the significance of differences stated)."""

from __future__ import annotations

import math
import warnings
from typing import Any

import numpy as np
import pandas as pd

from ..exceptions import InputError
from .pymc_model import OBS_ELEMENTS

__all__ = ["compare_runs"]

def compare_runs(idatas: dict[str, Any], *, evidence: dict[str, float | None] | None = None
                 ) -> pd.DataFrame:
    """Rank posteriors of the same target by PSIS-LOO (``arviz.compare``).

    Runs whose fitted element sets differ are compared on the elements they share: the
    pointwise log-likelihood of every other element is dropped (a LOO sum over different
    elements would not compare like with like), and ``table.attrs["left_out"]`` names,
    per run, the elements left out.

    Parameters
    ----------
    idatas : dict
        label -> InferenceData with a ``log_likelihood`` group holding ``y_obs``.
    evidence : dict, optional
        label -> log marginal likelihood (SMC); adds ``log_marginal_likelihood`` and
        ``log10_bayes_factor`` against the best-ranked run where known.

    Returns
    -------
    DataFrame
        ``arviz.compare`` columns (``elpd_loo``, ``se``, ``elpd_diff``, ``dse``, ``p_loo``,
        ``weight``, ``warning``...) and per run: ``within_uncertainty`` (True when
        ``|elpd_diff| <= 2 dse``: the difference from the best run is not resolved),
        ``pareto_k_max``, ``pareto_k_high`` (elements with k > 0.7) and ``reading`` (one
        sentence). ``attrs``: ``shared_elements``, ``left_out`` and ``pareto_k_advice``.

    Notes
    -----
    Pareto k is the shape of the tail fitted to the importance weights of each left-out
    element. Above 0.7 the importance-sampling estimate of that element's predictive
    density is unreliable (Vehtari, Gelman & Gabry 2017, Stat. Comput. 27, 1413;
    Vehtari et al. 2024, JMLR 25, 1): the element dominates its own fit (often an
    element off the trend). The remedy is to refit without that element and score it
    exactly, or to exclude it from both runs. A difference of less than about two of its
    standard errors is within its uncertainty (common practice).

    Raises
    ------
    InputError
        Fewer than two runs, a run without log-likelihood, runs sharing fewer than three
        elements, or different observed values of a shared element.
    """
    import arviz as az

    if len(idatas) < 2:
        raise InputError("give at least two result folders to compare", field="DIR")
    for label, idata in idatas.items():
        if "log_likelihood" not in idata.groups() or OBS_ELEMENTS not in idata.log_likelihood:
            raise InputError("the posterior has no log-likelihood of the elements",
                             file=label, field="log_likelihood")
    sets = {label: [str(e) for e in idata.observed_data[OBS_ELEMENTS]["elements"].values]
            for label, idata in idatas.items()}
    shared = [e for e in next(iter(sets.values()))
              if all(e in s for s in sets.values())]
    if len(shared) < 3:
        raise InputError(f"the runs share only {len(shared)} fitted elements ({shared}); "
                         "PSIS-LOO needs runs of the same target", field="observed_data")
    left_out = {label: [e for e in s if e not in shared] for label, s in sets.items()}
    ref_label = next(iter(idatas))
    ref_obs = idatas[ref_label].observed_data[OBS_ELEMENTS].sel(elements=shared)
    used = {}
    for label, idata in idatas.items():
        obs = idata.observed_data[OBS_ELEMENTS].sel(elements=shared)
        if not np.allclose(obs.values, ref_obs.values):
            bad = [e for e, a, b in zip(shared, obs.values, ref_obs.values, strict=True)
                   if not np.isclose(a, b)]
            raise InputError(f"observed values of {bad} differ from those of {ref_label}; "
                             "PSIS-LOO compares posteriors of the same target", file=label,
                             field="observed_data")
        used[label] = idata.sel(elements=shared) if left_out[label] else idata
    pareto: dict[str, tuple[float, list[str]]] = {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        table = az.compare(used, ic="loo", var_name=OBS_ELEMENTS)
        for label, idata in used.items():
            k = np.asarray(az.loo(idata, pointwise=True, var_name=OBS_ELEMENTS).pareto_k)
            pareto[label] = (float(np.max(k)), [e for e, kk in zip(shared, k, strict=True)
                                                if kk > 0.7])
    table = table.reset_index().rename(columns={"index": "run"})
    diff = table["elpd_diff"].to_numpy(float)
    dse = table["dse"].to_numpy(float)
    table["within_uncertainty"] = np.abs(diff) <= 2.0 * dse
    table["pareto_k_max"] = [pareto[r][0] for r in table["run"]]
    table["pareto_k_high"] = [" ".join(pareto[r][1]) for r in table["run"]]
    reading = []
    for i, r in enumerate(table["run"]):
        if i == 0:
            text = "best by PSIS-LOO"
        elif table["within_uncertainty"].iloc[i]:
            text = (f"elpd difference {diff[i]:.2f} ± {dse[i]:.2f}: within its uncertainty "
                    "(< 2 standard errors), not distinguishable from the best")
        else:
            text = (f"elpd difference {diff[i]:.2f} ± {dse[i]:.2f}: worse than the best by "
                    f"{diff[i] / dse[i]:.1f} standard errors" if dse[i] > 0 else
                    f"elpd difference {diff[i]:.2f}")
        if pareto[r][1]:
            text += f"; Pareto k > 0.7 for {', '.join(pareto[r][1])}"
        reading.append(text)
    table["reading"] = reading
    if evidence:
        lml = [evidence.get(r) for r in table["run"]]
        table["log_marginal_likelihood"] = lml
        best = lml[0]
        table["log10_bayes_factor_vs_best"] = [
            (v - best) / math.log(10) if v is not None and best is not None else None
            for v in lml]
    table.attrs["shared_elements"] = shared
    table.attrs["left_out"] = {k: v for k, v in left_out.items() if v}
    table.attrs["pareto_k_advice"] = (
        "Pareto k > 0.7 marks an element whose left-out predictive density the importance "
        "sampling cannot estimate reliably: the element dominates its own fit (often one "
        "off the trend). Refit without it and score it exactly, or exclude it in every "
        "run, before reading the elpd differences.")
    return table
