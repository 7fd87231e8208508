"""Physically impossible states are answers, not numbers.

With the mantle FeO fixed, a bulk holding less iron than the mantle needs gives a
negative core iron mass (and a negative core): such parameter sets exist inside the
declared bounds (a high volatility onset with a steep slope depletes Fe). The forward
model flags them, the hand-off leaves them out, the sampler's density is zero there and the
convex fit never returns one. Checked against a hand computation of the iron budget
(simulate, then check).
"""

from __future__ import annotations

import numpy as np
import pytest

from components.exceptions import SolverError
from inversion import kernel
from inversion.handoff import planet_draws
from inversion.model import forward
from inversion.planet import assemble
from tests.data.reference_problems import load_reference_problem


def _corner_scan(p, n=2000, seed=3):
    """Random weights, and the kinked form's corner region: onsets 700-1800 K (the
    declared prior reaches 1700 K), slopes up to 0.02 dex/K."""
    rng = np.random.default_rng(seed)
    w = rng.dirichlet(np.ones(len(p.components)), n)
    vol = np.stack([rng.uniform(700.0, 1800.0, n), rng.uniform(0.0, 0.02, n)], axis=1)
    return w, vol


def test_negative_core_iron_is_flagged_as_the_hand_computed_budget_says():
    p = load_reference_problem("demo", "feo")
    w, vol = _corner_scan(p)
    out = forward(p, w, vol, 0.0)
    fe = p.elements.index("Fe")
    # hand computation of the budget: the mantle holds F * M_s of iron (F its iron mass
    # fraction, fixed by the target's FeO), the bulk a_Fe; the core keeps the rest
    mantle_iron = p.mantle_Fe * out["M_s"]
    margin = 1.0 - mantle_iron / out["bulk"][:, fe]
    np.testing.assert_allclose(out["core_iron_margin"], margin, rtol=1e-9, atol=1e-12)
    # every other element enters the core with D >= 0, so iron alone decides
    np.testing.assert_array_equal(out["physical"], margin >= -1e-9)
    bad = ~out["physical"]
    assert 50 < bad.sum() < len(bad) - 50  # both kinds occur in the corner scan
    assert np.all(out["core"][bad, fe] < 0)
    # the model's CMF goes negative only in flagged states
    assert np.all(out["cmf"][~bad] >= 0)
    assert np.any(out["cmf"][bad] < 0)


def test_the_redox_split_is_always_physical():
    """With the redox split the mantle's iron follows from D_Fe > 0: m_Fe = a_Fe/(1 + D k)
    never exceeds the bulk, so every state is physical."""
    p = load_reference_problem("demo", "redox")
    w, vol = _corner_scan(p, n=300)
    out = forward(p, w, vol, 0.0)
    assert out["physical"].all()
    assert np.all(out["core_iron_margin"] >= 0)  # 0 where the core vanishes (k -> 0)


def test_handoff_leaves_unphysical_draws_out_and_refuses_when_none_is_left():
    p = load_reference_problem("demo", "feo")
    w, vol = _corner_scan(p, n=400)
    out = forward(p, w, vol, 0.0)
    planet = assemble(p, out)
    bad = ~out["physical"]
    assert bad.any() and (~bad).any()
    draws = planet_draws(p, planet)
    assert draws.n_unphysical == int(bad.sum())
    assert np.all(np.isnan(draws.core_mass_fraction[bad]))
    np.testing.assert_allclose(draws.core_mass_fraction[~bad], out["cmf"][~bad])
    keep_bad = {k: (v[bad] if isinstance(v, np.ndarray) and v.shape[:1] == bad.shape else v)
                for k, v in planet.items()}
    keep_bad["ratios"] = {k: np.asarray(v)[bad] for k, v in planet["ratios"].items()}
    with pytest.raises(SolverError, match="physical"):
        planet_draws(p, keep_bad)


def test_physical_state_under_jax_matches_numpy():
    jnp = pytest.importorskip("jax.numpy")
    from inversion.jaxmodel import jax_setup

    jax_setup()
    p = load_reference_problem("demo", "feo")
    w, vol = _corner_scan(p, n=50)
    out = forward(p, w, vol, 0.0)
    c = kernel.static_of(p)
    for i in range(0, 50, 7):
        o = kernel.forward(jnp, c, jnp.asarray(w[i]), jnp.asarray(vol[i]), jnp.asarray(0.0),
                           jnp.asarray(p.D))
        assert bool(o["physical"]) == bool(out["physical"][i])
        assert float(o["core_iron_margin"]) == pytest.approx(out["core_iron_margin"][i],
                                                             rel=1e-9, abs=1e-12)


def test_per_row_dIW_equals_one_row_at_a_time():
    """``forward(..., dIW=array)`` (the posterior draws of a sampled dIW) gives each row
    what a problem at that row's dIW gives (simulate, then check)."""
    import dataclasses

    p = load_reference_problem("demo", "redox")
    w, vol = _corner_scan(p, n=12, seed=5)
    vol[:, 0] = np.clip(vol[:, 0], 900.0, 1500.0)
    dIW = np.linspace(-4.0, -0.5, 12)
    out = forward(p, w, vol, 0.002, dIW=dIW)
    for i in range(12):
        one = forward(dataclasses.replace(p, dIW=float(dIW[i])), w[i:i + 1], vol[i:i + 1],
                      0.002)
        # the redox split's plain iteration stops for the whole batch when every row has
        # moved by < 1e-12 relative; a row alone stops at its own step, ~1e-10 away
        for key in ("log10N", "core", "k", "cmf", "D_Fe"):
            np.testing.assert_allclose(out[key][i], one[key][0], rtol=1e-8, atol=1e-300)
    with pytest.raises(ValueError, match="redox"):
        forward(load_reference_problem("demo", "feo"), w, vol, 0.0, dIW=dIW)
