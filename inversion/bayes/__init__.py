"""Bayesian inversion with PyMC (docs/model.md sections 8-9): priors, model, sampling, gate.

The physics is the single forward model of :mod:`inversion.kernel`, run on JAX
(:mod:`inversion.jaxmodel`) as one operation of the PyMC model: R-basis weights of the
building blocks on the simplex, the chosen volatility form, core formation (the fixed
point of the core-to-mantle mass ratio, with its implicit-function gradient), late
accretion, isotope mass balance; PyMC holds the priors and a Student-t likelihood with a
model-scatter term on the fitted elements.
:func:`sample` runs NUTS from the convex optimum (NumPyro's XLA-compiled NUTS by default;
nutpie or PyMC's own NUTS on request), applies the diagnostics gate and returns a
:class:`SampleResult`; the posterior draws of the whole planet come from the numpy run
of the same forward model, vectorised over draws (:func:`planet_draws`).

Modules, by concern: :mod:`.priors` (declared distributions, defaults, validation),
:mod:`.settings` (``[sampler]``), :mod:`.pymc_model` (the PyMC model),
:mod:`.engines` (start points, the NUTS engines, the run record), :mod:`.diagnostics`
(the gate), :mod:`.posterior` (log likelihood, posterior predictive, the planet's draws,
outliers, summaries), :mod:`.comparison` (LOO comparison), :mod:`.calibration`
(simulation-based calibration).

Notes
-----
Likelihood of the fitted elements (observed ``y_i``, 1-sigma ``sigma_i`` dex)::

    y_i ~ StudentT(nu = 4, mu_i(theta), sqrt(sigma_i**2 + tau**2))

with ``tau`` a model-scatter term (HalfNormal(0.05) dex); where the problem carries the
blocks' uncertainties (``Problem.Q_sigma_dex``) the scale also holds the end-member term
``sigma_model_i`` of :func:`end_member_sigma_dex` (added in quadrature). Each isotope anomaly of the
case adds ``eps_obs ~ Normal(eps_planet(w, v), sigma_eff(w, v))`` with ``eps_planet`` the
carrier-weighted mass balance of the building blocks and the late component, and
``sigma_eff**2 = sigma_obs**2 + sum_k phi_k**2 (s_k**2 + r_k**2 (eps_k - eps_planet)**2)``
(``phi_k`` the share of the carrier from column k, ``s_k`` the end-member's 1-sigma,
``r_k`` the relative 1-sigma of its carrier ratio; :func:`inversion.isotopes.effective_sigma`).

References
----------
Vehtari A., Gelman A., Simpson D., Carpenter B., Buerkner P.-C. (2021) Rank-normalization,
folding, and localization: an improved R-hat for assessing convergence of MCMC. Bayesian
Analysis 16, 667 (the gate thresholds: R-hat <= 1.01, bulk ESS >= 400).
Talts S., Betancourt M., Simpson D., Vehtari A., Gelman A. (2018) Validating Bayesian
inference algorithms with simulation-based calibration. arXiv:1804.06788.
"""


from __future__ import annotations

from .calibration import _flat_truth as _flat_truth
from .calibration import draw_prior, sbc, simulate, simulate_isotopes
from .comparison import compare_runs
from .diagnostics import (
    GATE_DIVERGENCES_MAX,
    GATE_ESS_BULK_MIN,
    GATE_RHAT_MAX,
    Diagnostics,
    diagnose,
)
from .engines import (
    SampleResult,
    sample,
    start_points,
)
from .engines import (
    _inside as _inside,
)
from .engines import (
    _NutpieModel as _NutpieModel,
)
from .engines import (
    _scale as _scale,
)
from .engines import (
    _unconstrain_function as _unconstrain_function,
)
from .posterior import (
    _add_observed as _add_observed,
)
from .posterior import (
    _interval as _interval,
)
from .posterior import (
    _obs_scale as _obs_scale,
)
from .posterior import (
    _with_y as _with_y,
)
from .posterior import (
    add_log_likelihood,
    add_posterior_predictive,
    main_parameters,
    outliers,
    planet_draws,
    posterior_arrays,
    posterior_planet,
    summary_table,
)
from .priors import (
    PRIOR_DISTRIBUTIONS,
    check_priors,
    default_priors,
)
from .priors import (
    _partitioned as _partitioned,
)
from .priors import (
    _support_of as _support_of,
)
from .priors import (
    _supports as _supports,
)
from .pymc_model import (
    OBS_ELEMENTS,
    STUDENT_NU,
    build_model,
    end_member_sigma_dex,
    parameter_names,
)
from .pymc_model import (
    _jax_predictions as _jax_predictions,
)
from .pymc_model import (
    _prior_rv as _prior_rv,
)
from .settings import (
    _SAMPLER_KEYS as _SAMPLER_KEYS,
)
from .settings import (
    ENGINES,
    MASS_MATRICES,
    PYMC_INITS,
    SamplerSettings,
    check_sampler_settings,
)

__all__ = ["draw_prior", "simulate", "simulate_isotopes", "sbc", "compare_runs",
           "GATE_RHAT_MAX", "GATE_ESS_BULK_MIN",
           "GATE_DIVERGENCES_MAX", "Diagnostics", "diagnose", "SampleResult", "start_points",
           "sample", "add_log_likelihood", "add_posterior_predictive", "posterior_arrays",
           "posterior_planet", "planet_draws", "outliers", "summary_table", "main_parameters",
           "PRIOR_DISTRIBUTIONS", "default_priors", "check_priors", "STUDENT_NU", "OBS_ELEMENTS",
           "end_member_sigma_dex", "build_model", "parameter_names", "SamplerSettings", "ENGINES",
           "MASS_MATRICES", "PYMC_INITS", "check_sampler_settings"]
