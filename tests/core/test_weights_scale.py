"""Aggregates are ratios of weighted sums, so the scale of the weights must not matter: weights
near the largest float neither overflow nor zero the shares, and subnormal weights keep every
digit.  Source: sample enumeration (Train 2009, sec. 3.6.1, from memory), where shares and
aggregate elasticities are weighted means, invariant to scaling the weights."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from service.choice import Change, ScoreOptions, Variant, check_batch, run_scenarios, score
from service.choice.aggregate import aggregate_elasticity, shares, weighted_mean
from tests.core.conftest import commute_batch
from tests.core.test_elasticities import price_batch, simple


@pytest.mark.parametrize("scale", [1e308, 1e-320, 2.0**-1074])
def test_shares_and_aggregate_elasticities_do_not_depend_on_the_scale_of_the_weights(scale):
    rng = np.random.default_rng(3)
    p = rng.dirichlet(np.ones(4), 50).T  # (J, N)
    e = rng.normal(size=(4, 4, 50))
    w = np.ones(50)
    scaled = np.full(50, scale)
    np.testing.assert_allclose(shares(p, scaled), shares(p, w), rtol=1e-15)
    np.testing.assert_allclose(
        aggregate_elasticity(p, scaled, e), aggregate_elasticity(p, w, e), rtol=1e-14
    )
    assert weighted_mean(p[0], scaled) == pytest.approx(float(p[0].mean()), rel=1e-15)


def test_a_subnormal_weight_beside_zeros_gives_the_shares_of_its_own_situation():
    p = np.array([[0.2, 0.7], [0.8, 0.3]])
    np.testing.assert_array_equal(shares(p, np.array([1e-320, 0.0])), [0.2, 0.8])


def test_scoring_with_weights_near_the_largest_float_aggregates_like_equal_weights(mnl):
    batch = commute_batch(mnl, 30, seed=2)
    options = ScoreOptions(aggregate=True, elasticities=("fare",))
    equal = check_batch(mnl, dataclasses.replace(batch, weights=np.ones(30))).batch
    huge = check_batch(mnl, dataclasses.replace(batch, weights=np.full(30, 1e308))).batch
    a, b = score(mnl, equal, options).aggregate, score(mnl, huge, options).aggregate
    np.testing.assert_allclose(b.shares, a.shares, rtol=1e-15)
    assert b.shares.sum() == pytest.approx(1.0, abs=1e-15)
    np.testing.assert_allclose(b.elasticities["fare"], a.elasticities["fare"], rtol=1e-13)


def test_scenario_shares_and_mean_surplus_change_survive_huge_weights():
    model, base = simple("multinomial"), price_batch(30, 4)
    variants = [Variant("cut", changes=(Change("b", "price", "set", 1.0),))]
    equal = run_scenarios(model, dataclasses.replace(base, weights=np.ones(30)), variants)
    huge = run_scenarios(model, dataclasses.replace(base, weights=np.full(30, 1e308)), variants)
    np.testing.assert_allclose(huge.base.shares, equal.base.shares, rtol=1e-15)
    np.testing.assert_allclose(huge.variants[0].shares, equal.variants[0].shares, rtol=1e-15)
    assert equal.variants[0].surplus_change_mean is not None
    assert huge.variants[0].surplus_change_mean == pytest.approx(
        equal.variants[0].surplus_change_mean, rel=1e-13
    )


def test_scenario_totals_beyond_the_largest_float_are_infinite_without_a_warning(mnl):
    """Totals are absolute, not ratios: they overflow to inf (which the HTTP layer refuses
    as not finite, naming the field) rather than warn."""
    base = commute_batch(mnl, 30, seed=4)
    huge = dataclasses.replace(base, weights=np.full(30, 1e308))
    result = run_scenarios(mnl, huge, [Variant("no bike", remove=("bike",))])
    assert result.base.revenue_total == np.inf
