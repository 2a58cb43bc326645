"""What-if scenarios: shares, share changes, surplus changes and revenue.

Train (2009) section and equation numbers are cited from memory.
"""

from __future__ import annotations

import numpy as np
import pytest

from service.choice import Batch, Change, ScoringError, Variant, run_scenarios, score
from tests.core.conftest import commute_batch
from tests.core.test_elasticities import BETA, price_batch, simple


def test_a_price_change_gives_the_shares_of_the_changed_batch():
    model = simple("nested")
    base = price_batch(200, 1, p_unavailable=0.2)
    variant = Variant("a dearer", changes=(Change("a", "price", "multiply", 1.2),))
    result = run_scenarios(model, base, [variant])
    x = base.attributes.copy()
    x[:, 0, 0] *= 1.2
    changed = score(model, Batch(x, base.context, base.available, base.weights))
    w = base.weights
    expected = (w[:, None] * changed.probabilities).sum(0) / w.sum()
    out = result.variants[0]
    # Source: sample enumeration of the changed situations (Train 2009, sec. 3.6.1, from memory).
    np.testing.assert_allclose(out.shares, expected, rtol=1e-13)
    np.testing.assert_allclose(out.share_deltas, out.shares - result.base.shares)
    assert out.share_deltas[0] < 0 and np.all(out.share_deltas[1:] > 0)
    # Compensating variation (Train 2009, eq. 3.11, from memory): (LS1 - LS0) / alpha.
    base_ls = score(model, base).logsum
    np.testing.assert_allclose(out.surplus_change, (changed.logsum - base_ls) / -BETA)
    assert out.surplus_change_total == pytest.approx(float(out.surplus_change @ w))
    assert out.surplus_change_mean == pytest.approx(out.surplus_change_total / w.sum())


def test_a_uniform_price_rise_costs_every_consumer_exactly_that_amount():
    model = simple("multinomial")
    base = price_batch(50, 2)
    changes = tuple(Change(a, "price", "add", 2.0) for a in "abcd")
    out = run_scenarios(model, base, [Variant("all dearer", changes=changes)]).variants[0]
    # Source: common practice (money-metric utility with a generic linear price):
    # every alternative 2 dearer means a surplus change of exactly -2, shares unchanged.
    np.testing.assert_allclose(out.surplus_change, -2.0, rtol=1e-12)
    np.testing.assert_allclose(out.share_deltas, 0.0, atol=1e-15)


def test_removing_an_alternative_in_logit_rescales_the_others_and_costs_ln_one_minus_p():
    model = simple("multinomial")
    base = price_batch(100, 3)
    result = run_scenarios(model, base, [Variant("no c", remove=("c",))])
    p = score(model, base).probabilities
    w = base.weights
    # Source: IIA (Train 2009, sec. 3.3.2): P_j' = P_j / (1 - P_c); from eq. 3.6 and 3.10 (from memory)
    # the logsum falls by -ln(1 - P_c), so Delta CS = ln(1 - P_c) / alpha.
    p_new = np.where(np.arange(4) == 2, 0.0, p / (1 - p[:, [2]]))
    np.testing.assert_allclose(result.variants[0].shares, (w @ p_new) / w.sum(), rtol=1e-12)
    np.testing.assert_allclose(
        result.variants[0].surplus_change, np.log1p(-p[:, 2]) / -BETA, rtol=1e-11
    )
    assert result.variants[0].shares[2] == 0.0


def test_revenue_is_expected_spend_per_situation_and_weighted_in_total():
    model = simple("multinomial")
    base = price_batch(100, 4, p_unavailable=0.3)
    variant = Variant("cut", changes=(Change("b", "price", "set", 1.0),))
    result = run_scenarios(model, base, [variant])
    p = score(model, base).probabilities
    cost = np.where(base.available, base.attributes[:, :, 0], 0.0)
    # Source: expected revenue = sum_j P_j price_j (common practice).
    np.testing.assert_allclose(result.base.revenue, (p * cost).sum(1), rtol=1e-13)
    assert result.base.revenue_total == pytest.approx(float(result.base.revenue @ base.weights))
    out = result.variants[0]
    assert out.revenue_change_total == pytest.approx(out.revenue_total - result.base.revenue_total)


def test_adding_an_alternative_needs_its_values_in_the_base(mnl):
    base = commute_batch(mnl, 20, seed=5)
    base.available[:, 2] = False
    base.attributes[3, 2, 2] = np.nan  # rail wait missing in situation 3
    with pytest.raises(ScoringError) as err:
        run_scenarios(mnl, base, [Variant("rail opens", add=("rail",))])
    (problem,) = err.value.problems
    assert problem.path == "variants[0].add[0]"
    assert "attributes.rail.wait" in problem.message and "3" in problem.message
    # Supplying the value in the variant itself makes it valid.
    fixed = Variant("rail opens", add=("rail",), changes=(Change("rail", "wait", "set", 5.0),))
    out = run_scenarios(mnl, base, [fixed]).variants[0]
    assert out.shares[2] > 0 and result_is_finite(out)


def result_is_finite(out) -> bool:
    return bool(np.all(np.isfinite(out.shares)) and np.all(np.isfinite(out.logsum)))


def test_a_variant_leaving_no_alternative_is_an_error_naming_it():
    model = simple("multinomial")
    base = price_batch(5, 6)
    with pytest.raises(ScoringError) as err:
        run_scenarios(model, base, [Variant("ok"), Variant("empty", remove=tuple("abcd"))])
    assert {p.path for p in err.value.problems} == {"variants[1].remove"}


def test_an_override_outside_a_log_domain_is_an_error_naming_the_change(mnl):
    base = commute_batch(mnl, 5, seed=7)
    bad = Variant("instant", changes=(Change("car", "time", "set", 0.0),))
    with pytest.raises(ScoringError) as err:
        run_scenarios(mnl, base, [bad])
    assert {p.path for p in err.value.problems} == {"variants[0].changes[0]"}
    assert "log" in err.value.problems[0].message


def test_unknown_names_in_variants_are_refused_by_field(mnl):
    base = commute_batch(mnl, 5)
    variants = [
        Variant(
            "x",
            changes=(Change("tram", "fare", "set", 1), Change("car", "comfort", "scale", 1)),
            remove=("ferry",),
        ),
        Variant("x", changes=(Change("car", "fare", "set", float("nan")),)),
        Variant("y", changes=(Change("car", "fare", "add", True),)),
    ]
    with pytest.raises(ScoringError) as err:
        run_scenarios(mnl, base, variants)
    assert {p.path for p in err.value.problems} == {
        "variants[0].changes[0].alternative",
        "variants[0].changes[1].attribute",
        "variants[0].changes[1].op",
        "variants[0].remove[0]",
        "variants[1].name",
        "variants[1].changes[0].value",
        "variants[2].changes[0].value",
    }


def test_scenarios_without_a_valid_cost_effect_still_give_shares(mnl):
    # The commute model's fare coefficients are not generic (rail interacts with income).
    base = commute_batch(mnl, 30, seed=8)
    result = run_scenarios(
        mnl, base, [Variant("bus cut", changes=(Change("bus", "fare", "add", -1),))]
    )
    out = result.variants[0]
    assert out.surplus_change is None and result.surplus_unavailable
    assert out.share_deltas[1] > 0
    assert out.revenue is not None  # revenue needs only a cost attribute


def test_scoring_and_scenarios_leave_the_input_batch_untouched(nested):
    base = commute_batch(nested, 40, seed=9, p_unavailable=0.3)
    copies = [a.copy() for a in (base.attributes, base.context, base.available, base.weights)]
    score(nested, base)
    run_scenarios(
        nested,
        base,
        [Variant("v", changes=(Change("car", "fare", "add", 1.0),), remove=("bus",))],
    )
    for before, after in zip(
        copies, (base.attributes, base.context, base.available, base.weights), strict=True
    ):
        np.testing.assert_array_equal(before, after)


def test_a_variant_whose_utilities_overflow_is_refused_naming_it(mnl):
    base = commute_batch(mnl, 5, seed=10)
    base.context[:, 0] = 1e200  # income; rail's fare * income overflows once fare is huge
    boom = Variant("boom", changes=(Change("rail", "fare", "set", 1e200),))
    with pytest.raises(ScoringError) as err:
        run_scenarios(mnl, base, [Variant("fine"), boom])
    # Named at the variant (the request has no situations inside a variant), situation by
    # situation in the message.
    assert [p.path for p in err.value.problems] == ["variants[1]"] * 5
    assert [p.message.split(":")[0] for p in err.value.problems] == [
        f"situation {n}" for n in range(5)
    ]


def test_surplus_change_matches_a_simulation_of_the_random_utility_model():
    model = simple("multinomial")
    base = price_batch(3, 11, p_unavailable=0.2)
    variant = Variant("b cut, c gone", changes=(Change("b", "price", "add", -2.0),), remove=("c",))
    out = run_scenarios(model, base, [variant]).variants[0]
    # Source: simulation of the random utility model with iid standard Gumbel errors and
    # common draws: Delta CS = E[max U^1 - max U^0] / alpha (Train 2009, sec. 3.5, from memory).
    rng = np.random.default_rng(12)
    r = 200_000
    est = model.coefficients.as_mapping()
    asc = np.array([est["asc_a"], est["asc_b"], est["asc_c"], 0.0])
    price = base.attributes[:, :, 0]
    price1 = price.copy()
    price1[:, 1] -= 2.0
    avail1 = base.available.copy()
    avail1[:, 2] = False
    for n in range(base.size):
        e = rng.gumbel(size=(r, 4))
        u0 = np.where(base.available[n], asc + BETA * price[n], -np.inf) + e
        u1 = np.where(avail1[n], asc + BETA * price1[n], -np.inf) + e
        diff = (u1.max(axis=1) - u0.max(axis=1)) / -BETA
        bound = 5 * diff.std() / np.sqrt(r) + 1e-12
        assert abs(diff.mean() - out.surplus_change[n]) <= bound, (
            diff.mean(),
            out.surplus_change[n],
        )


def test_a_change_to_an_attribute_the_alternative_does_not_use_is_refused(mnl):
    # The commute model's car has no waiting time: a change to it could move nothing, so it
    # is a mistake in the request, named by field (common practice: refuse, do not ignore).
    base = commute_batch(mnl, 3)
    with pytest.raises(ScoringError) as err:
        run_scenarios(mnl, base, [Variant("car wait", changes=(Change("car", "wait", "add", 5),))])
    assert [p.path for p in err.value.problems] == ["variants[0].changes[0].attribute"]
    assert "does not enter the utility of 'car'" in err.value.problems[0].message
