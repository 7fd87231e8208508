"""Two-stage accretion from isotope anomalies (inversion.staged): simulate, then recover.

The building blocks A, B, C and their anomalies are invented (a constructed scenario);
retention factors use the Earth-calibrated D of the library (Ni 26.5, Mo 100, Ru 1e4;
components/data/partitioning) with a core/mantle mass ratio of 0.48.
"""

from __future__ import annotations

import numpy as np
import pytest

from inversion.staged import IsotopeSystem, fit_staged, retention, stage_prediction

BLOCKS = ("A", "B", "C")
# name, eps per block, carrier concentration per block [kg/kg], early retention
SPEC = [("l1", (0.0, -0.6, 1.8), (0.30, 0.35, 0.45), 1.0),
        ("l2", (0.1, -0.4, 2.5), (6e-4, 7e-4, 4e-4), 1.0),
        ("l3", (-0.2, 0.5, 3.0), (1.2e-2, 1.3e-2, 0.9e-2), 1.0),
        ("s1", (0.0, -0.3, 0.5), (1.8e-2, 1.6e-2, 1.1e-2), retention(26.5, 0.48)),
        ("s2", (0.1, 0.4, 1.5), (1.0e-6, 1.3e-6, 1.0e-6), retention(100.0, 0.48)),
        ("s3", (-0.1, -0.25, -0.8), (7e-7, 8e-7, 7e-7), retention(1e4, 0.48))]
SIGMA = 0.03
F_LATE = 0.3


def systems(obs):
    return [IsotopeSystem(n, float(o), SIGMA, e, (0.03, 0.03, 0.05), c, rho, 1.0)
            for (n, e, c, rho), o in zip(SPEC, obs, strict=True)]


def test_retention_and_lithophile_balance():
    assert retention(100.0, 0.5) == pytest.approx(1 / 51)
    # all-lithophile system: the mantle value is the whole planet's carrier balance
    s = IsotopeSystem("l", 0.0, 0.1, (1.0, -1.0), (0.0, 0.0), (1.0, 3.0))
    eps, sig = stage_prediction([s], np.array([1.0, 0.0]), np.array([0.0, 1.0]), 0.25)
    # carrier from stage 1 block 1: 0.75 * 1; stage 2 block 2: 0.25 * 3 -> equal shares
    assert eps[0] == pytest.approx(0.0)
    assert sig[0] == pytest.approx(0.1)


def test_different_early_and_late_mixtures_are_recovered():
    x1, x2 = np.array([0.6, 0.3, 0.1]), np.array([0.1, 0.2, 0.7])
    truth, _ = stage_prediction(systems(np.zeros(len(SPEC))), x1, x2, F_LATE)
    rng = np.random.default_rng(0)
    for r in range(3):
        obs = truth + rng.normal(scale=SIGMA, size=truth.size)
        res = fit_staged(systems(obs), BLOCKS, late_fraction=F_LATE, seed=r, starts=4)
        # tolerance 0.15 on each mass fraction (noise 0.03 on six systems)
        assert np.allclose(list(res.early.values()), x1, atol=0.15), res.early
        assert np.allclose(list(res.late.values()), x2, atol=0.15), res.late
        assert res.preferred == "staged"
        assert res.lr_pvalue < 1e-6
    assert set(res.to_dataframe().columns) == {"early", "late", "single"}


def test_one_mixture_throughout_is_preferred_when_true():
    xs = np.array([0.5, 0.3, 0.2])
    truth, _ = stage_prediction(systems(np.zeros(len(SPEC))), xs, xs, F_LATE)
    rng = np.random.default_rng(1)
    prefs = []
    for r in range(8):
        obs = truth + rng.normal(scale=SIGMA, size=truth.size)
        res = fit_staged(systems(obs), BLOCKS, late_fraction=F_LATE, seed=r, starts=3)
        prefs.append(res.preferred)
        assert np.allclose(list(res.single.values()), xs, atol=0.1)
    # BIC's penalty for two extra weights with six systems is 2 ln 6 = 3.6; a chi2 with
    # 2 degrees of freedom exceeds it with probability 0.17: most replicates prefer one
    # mixture
    assert prefs.count("single") >= 6, prefs


def test_bad_input_is_refused():
    s = systems(np.zeros(len(SPEC)))
    with pytest.raises(ValueError, match="late_fraction"):
        fit_staged(s, BLOCKS, late_fraction=1.0)
    with pytest.raises(ValueError, match="at least 5"):
        fit_staged(s[:4], BLOCKS, late_fraction=0.3)
