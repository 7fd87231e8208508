"""Convergence diagnostics and the gate (Vehtari et al. 2021: R-hat <= 1.01, bulk ESS >= 400,
no divergences).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["GATE_RHAT_MAX", "GATE_ESS_BULK_MIN", "GATE_DIVERGENCES_MAX", "Diagnostics", "diagnose"]

#: Gate thresholds (Vehtari et al. 2021).
GATE_RHAT_MAX = 1.01
GATE_ESS_BULK_MIN = 400.0
GATE_DIVERGENCES_MAX = 0


@dataclass(frozen=True)
class Diagnostics:
    """The diagnostics gate (Vehtari et al. 2021): thresholds, values, verdict."""

    rhat_max: float
    ess_bulk_min: float
    divergences: int
    passed: bool
    worst_rhat: str
    worst_ess: str
    rhat_threshold: float = GATE_RHAT_MAX
    ess_bulk_threshold: float = GATE_ESS_BULK_MIN
    divergences_threshold: int = GATE_DIVERGENCES_MAX

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready view (``diagnostics.json``)."""
        return {"rhat_max": self.rhat_max, "ess_bulk_min": self.ess_bulk_min,
                "divergences": self.divergences, "passed": self.passed,
                "worst_rhat_parameter": self.worst_rhat, "worst_ess_parameter": self.worst_ess,
                "thresholds": {"rhat_max": self.rhat_threshold,
                               "ess_bulk_min": self.ess_bulk_threshold,
                               "divergences_max": self.divergences_threshold},
                "reference": "vehtari2021"}

    def messages(self) -> list[str]:
        """One line per failed criterion, saying what to do about it."""
        out = []
        if not self.rhat_max <= self.rhat_threshold:
            out.append(f"R-hat {self.rhat_max:.4f} > {self.rhat_threshold} ({self.worst_rhat}):"
                       " chains disagree; run longer (--tune, --draws) or check the priors")
        if not self.ess_bulk_min >= self.ess_bulk_threshold:
            out.append(f"bulk ESS {self.ess_bulk_min:.0f} < {self.ess_bulk_threshold:.0f} "
                       f"({self.worst_ess}): run more draws (--draws) or chains (--chains)")
        if self.divergences > self.divergences_threshold:
            out.append(f"{self.divergences} divergent transitions: raise [sampler] "
                       "target_accept (e.g. 0.95) or reparameterise the priors")
        return out


def diagnose(idata: Any, names: list[str]) -> Diagnostics:
    """Apply the gate to the free parameters ``names`` of a posterior."""
    import arviz as az

    rh = az.rhat(idata, var_names=names)
    es = az.ess(idata, var_names=names, method="bulk")
    rmax, rname = -math.inf, ""
    emin, ename = math.inf, ""
    for n in names:
        r = np.atleast_1d(rh[n].values)
        e = np.atleast_1d(es[n].values)
        if r.size and np.nanmax(r) > rmax or not np.isfinite(r).all():
            rmax = float(np.max(r)) if np.isfinite(r).all() else math.inf
            rname = n
        if e.size and (np.nanmin(e) < emin or not np.isfinite(e).all()):
            emin = float(np.min(e)) if np.isfinite(e).all() else 0.0
            ename = n
    div = int(idata.sample_stats["diverging"].values.sum())
    passed = rmax <= GATE_RHAT_MAX and emin >= GATE_ESS_BULK_MIN and div <= GATE_DIVERGENCES_MAX
    return Diagnostics(rhat_max=float(rmax), ess_bulk_min=float(emin), divergences=div,
                       passed=bool(passed), worst_rhat=rname, worst_ess=ename)
