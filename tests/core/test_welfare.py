"""Consumer surplus in money units, and when it is refused.

Train (2009) section and equation numbers are cited from memory.
"""

from __future__ import annotations

import numpy as np
import pytest

from service.choice import Batch, ScoreOptions, ScoringError, score
from tests.core.conftest import commute_spec, model_from
from tests.core.test_elasticities import BETA, price_batch, simple


def with_income_interaction():
    """Cost effect b_price + b_price_income * income in every alternative."""
    alts = ["a", "b", "c"]
    terms = [
        {"coefficient": "b_price", "attribute": "price"},
        {"coefficient": "b_price_income", "attribute": "price", "context": "income"},
    ]
    spec = {
        "name": "income",
        "family": "multinomial",
        "alternatives": [{"id": a} for a in alts],
        "attributes": [{"name": "price", "role": "cost"}],
        "context": [{"name": "income"}],
        "utilities": {a: terms + ([{"coefficient": f"asc_{a}"}] if a != "c" else []) for a in alts},
    }
    est = {"b_price": -0.5, "b_price_income": 0.004, "asc_a": 0.2, "asc_b": -0.1}
    return model_from(spec, est)


@pytest.mark.parametrize("family", ["multinomial", "nested"])
def test_surplus_is_logsum_over_the_marginal_utility_of_money(family):
    model = simple(family)
    batch = price_batch(100, 1, p_unavailable=0.3)
    r = score(model, batch, ScoreOptions(surplus=True))
    # Source: Train 2009, eq. 3.10 (from memory): E(CS) = logsum / alpha, alpha = -beta_price.
    np.testing.assert_allclose(r.surplus, r.logsum / -BETA, rtol=1e-13)


@pytest.mark.parametrize("family", ["multinomial", "nested"])
def test_raising_every_price_by_d_lowers_surplus_by_exactly_d(family):
    model = simple(family)
    batch = price_batch(100, 2, p_unavailable=0.3)
    up = Batch(batch.attributes + 1.5, batch.context, batch.available, batch.weights)
    before = score(model, batch, ScoreOptions(surplus=True)).surplus
    after = score(model, up, ScoreOptions(surplus=True)).surplus
    # Source: common practice (money-metric utility): a uniform price rise of d costs
    # every consumer exactly d when cost enters linearly with a generic coefficient.
    np.testing.assert_allclose(before - after, 1.5, rtol=1e-9)


def test_surplus_with_an_income_interaction_varies_by_situation():
    model = with_income_interaction()
    rng = np.random.default_rng(3)
    n = 50
    z = rng.uniform(10, 100, (n, 1))
    batch = Batch(rng.uniform(1, 9, (n, 3, 1)), z, np.ones((n, 3), bool), np.ones(n))
    r = score(model, batch, ScoreOptions(surplus=True))
    alpha = 0.5 - 0.004 * z[:, 0]
    # Source: Train 2009, eq. 3.10 (from memory), alpha_n = -dV/d(price) per situation.
    np.testing.assert_allclose(r.surplus, r.logsum / alpha, rtol=1e-13)

    z_bad = z.copy()
    z_bad[7, 0] = 200.0  # alpha = 0.5 - 0.8 < 0
    bad = Batch(batch.attributes, z_bad, batch.available, batch.weights)
    with pytest.raises(ScoringError) as err:
        score(model, bad, ScoreOptions(surplus=True))
    assert [p.path for p in err.value.problems] == ["situations[7].context"]


def test_surplus_is_refused_without_a_cost_attribute():
    spec = commute_spec()
    spec["attributes"][0].pop("role")
    from tests.core.conftest import COMMUTE_ESTIMATES

    model = model_from(spec, COMMUTE_ESTIMATES)
    batch = price_batch(1, 0)
    with pytest.raises(ScoringError) as err:
        score(model, batch, ScoreOptions(surplus=True))
    assert err.value.problems[0].path == "options.surplus"
    assert "cost" in err.value.problems[0].message


def test_surplus_is_refused_with_a_positive_cost_coefficient():
    model = model_from(
        {
            "name": "odd",
            "family": "binary",
            "alternatives": [{"id": "yes"}, {"id": "no"}],
            "attributes": [{"name": "price", "role": "cost"}],
            "utilities": {
                "yes": [{"coefficient": "b", "attribute": "price"}],
                "no": [{"coefficient": "b", "attribute": "price"}],
            },
        },
        {"b": 0.2},
    )
    with pytest.raises(ScoringError) as err:
        score(model, price_batch(2, 0), ScoreOptions(surplus=True))
    assert err.value.problems[0].path == "coefficients.b"
    assert "negative" in err.value.problems[0].message


def test_surplus_is_refused_when_cost_coefficients_are_not_generic(mnl):
    # In the commute model only rail's fare interacts with income.
    with pytest.raises(ScoringError) as err:
        score(mnl, price_batch(2, 0), ScoreOptions(surplus=True))
    assert {p.path for p in err.value.problems} == {"utilities.rail"}


def test_surplus_is_refused_when_cost_enters_through_a_transform():
    model = model_from(
        {
            "name": "logprice",
            "family": "binary",
            "alternatives": [{"id": "yes"}, {"id": "no"}],
            "attributes": [{"name": "price", "role": "cost"}],
            "utilities": {
                "yes": [{"coefficient": "b", "attribute": "price", "transform": "log"}],
                "no": [{"coefficient": "b", "attribute": "price", "transform": "log"}],
            },
        },
        {"b": -1.0},
    )
    with pytest.raises(ScoringError) as err:
        score(model, price_batch(2, 0), ScoreOptions(surplus=True))
    assert {p.path for p in err.value.problems} == {
        "utilities.yes[0].transform",
        "utilities.no[0].transform",
    }
