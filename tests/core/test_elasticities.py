"""Elasticities and marginal effects: published formulas and finite differences.

Train (2009) section and equation numbers are cited from memory.
"""

from __future__ import annotations

import numpy as np
import pytest

from service.choice import Batch, ScoreOptions, ScoringError, score
from tests.core.conftest import commute_batch, model_from

BETA = -0.3


def simple(family: str, lam=(0.5, 0.8)):
    """Generic linear price and alternative-specific constants; nests {a, b}, {c, d}."""
    alts = ["a", "b", "c", "d"]
    spec = {
        "name": "simple",
        "family": family,
        "alternatives": [{"id": a} for a in alts],
        "attributes": [{"name": "price", "role": "cost"}],
        "utilities": {
            a: [{"coefficient": "b_price", "attribute": "price"}]
            + ([{"coefficient": f"asc_{a}"}] if a != "d" else [])
            for a in alts
        },
    }
    est = {"b_price": BETA, "asc_a": 0.5, "asc_b": -0.4, "asc_c": 0.9}
    if family == "nested":
        spec["nests"] = [
            {"id": "n1", "scale": "l1", "alternatives": ["a", "b"]},
            {"id": "n2", "scale": "l2", "alternatives": ["c", "d"]},
        ]
        est.update(l1=lam[0], l2=lam[1])
    return model_from(spec, est)


def price_batch(n: int, seed: int, p_unavailable: float = 0.0) -> Batch:
    rng = np.random.default_rng(seed)
    avail = rng.random((n, 4)) >= p_unavailable
    avail[:, 0] = True
    return Batch(rng.uniform(1, 10, (n, 4, 1)), np.zeros((n, 0)), avail, np.ones(n))


def test_logit_elasticities_follow_train_formulas():
    model = simple("multinomial")
    batch = price_batch(200, 1)
    r = score(model, batch, ScoreOptions(elasticities=("price",)))
    p, x, e = r.probabilities, batch.attributes[:, :, 0], r.elasticities["price"].elasticity
    # Source: Train 2009, sec. 3.6: own E_ii = beta x_i (1 - P_i); cross E_ij = -beta x_j P_j.
    own = BETA * x * (1 - p)
    cross = -BETA * x * p
    for i in range(4):
        for j in range(4):
            expected = own[:, i] if i == j else cross[:, j]
            np.testing.assert_allclose(e[:, i, j], expected, rtol=1e-12)
    # Marginal effect dP_i/dx_j = P_i (delta_ij - P_j) beta (Train 2009, sec. 3.6).
    me = r.elasticities["price"].marginal_effect
    np.testing.assert_allclose(me[:, 0, 0], BETA * p[:, 0] * (1 - p[:, 0]), rtol=1e-12)
    np.testing.assert_allclose(me[:, 0, 2], -BETA * p[:, 0] * p[:, 2], rtol=1e-12)


def test_nested_logit_elasticities_follow_train_formulas():
    lam = (0.5, 0.8)
    model = simple("nested", lam)
    batch = price_batch(200, 2)
    r = score(model, batch, ScoreOptions(elasticities=("price",)))
    p, x, e = r.probabilities, batch.attributes[:, :, 0], r.elasticities["price"].elasticity
    nest = [0, 0, 1, 1]
    cond = p / np.stack([p[:, [0, 1]].sum(1)] * 2 + [p[:, [2, 3]].sum(1)] * 2, axis=1)
    # Source: Train 2009, sec. 4.2.3 (from memory), for i in nest k:
    # own E_ii = beta x_i [1 - P_i + (1/l_k - 1)(1 - P_i|k)];
    # same nest E_ij = -beta x_j [P_j + (1/l_k - 1) P_j|k]; other nest E_ij = -beta x_j P_j.
    for i in range(4):
        k = 1 / lam[nest[i]] - 1
        for j in range(4):
            if i == j:
                expected = BETA * x[:, i] * (1 - p[:, i] + k * (1 - cond[:, i]))
            elif nest[i] == nest[j]:
                expected = -BETA * x[:, j] * (p[:, j] + k * cond[:, j])
            else:
                expected = -BETA * x[:, j] * p[:, j]
            np.testing.assert_allclose(e[:, i, j], expected, rtol=1e-11, atol=1e-15)


def test_log_transform_elasticity_is_the_coefficient_times_one_minus_p(mnl):
    batch = commute_batch(mnl, 100, seed=3)
    r = score(mnl, batch, ScoreOptions(elasticities=("time",)))
    e, p = r.elasticities["time"].elasticity, r.probabilities
    # Source: Train 2009, sec. 3.6 with V = b ln(time): dV/d ln(time) = b, so the own
    # elasticity is b (1 - P_i) and the cross elasticity -b P_j (car, bus, rail).
    np.testing.assert_allclose(e[:, 0, 0], -0.9 * (1 - p[:, 0]), rtol=1e-12)
    np.testing.assert_allclose(e[:, 1, 2], 0.9 * p[:, 2], rtol=1e-12)


def finite_difference(model, batch, name, j, h=1e-6):
    """Central difference of our own probabilities in x_j[name] (or context ``name``)."""

    def probs(delta):
        x, z = batch.attributes.copy(), batch.context.copy()
        if name in model.attributes:
            x[:, j, model.attributes.index(name)] += delta
        else:
            z[:, model.context.index(name)] += delta
        return score(model, Batch(x, z, batch.available, batch.weights)).probabilities

    return (probs(h) - probs(-h)) / (2 * h)


@pytest.mark.parametrize("family", ["multinomial", "nested"])
@pytest.mark.parametrize("name", ["fare", "time", "wait"])
def test_attribute_marginal_effects_equal_finite_differences(family, name, mnl, nested):
    model = mnl if family == "multinomial" else nested
    batch = commute_batch(model, 60, seed=4, p_unavailable=0.3)
    r = score(model, batch, ScoreOptions(elasticities=(name,)))
    me = r.elasticities[name].marginal_effect
    e = r.elasticities[name].elasticity
    a = model.attributes.index(name)
    for j in range(4):
        # Source: common practice, central finite differences (error O(h^2)).
        fd = finite_difference(model, batch, name, j)
        np.testing.assert_allclose(me[:, :, j], fd, rtol=1e-5, atol=1e-9)
        # Point elasticity = dP_i/dx_j * x_j / P_i (definition, Train 2009, sec. 3.6).
        x = np.where(batch.available[:, j], batch.attributes[:, j, a], 0)
        np.testing.assert_allclose(
            e[:, :, j] * r.probabilities, me[:, :, j] * x[:, None], rtol=1e-12, atol=1e-15
        )
    # Unavailable rows and columns are exactly zero.
    assert np.all(me[~batch.available] == 0)
    assert np.all(e.transpose(0, 2, 1)[~batch.available] == 0)


@pytest.mark.parametrize("family", ["multinomial", "nested"])
def test_context_marginal_effects_equal_finite_differences(family, mnl, nested):
    model = mnl if family == "multinomial" else nested
    batch = commute_batch(model, 60, seed=5, p_unavailable=0.3)
    r = score(model, batch, ScoreOptions(elasticities=("income",)))
    me, e = r.elasticities["income"].marginal_effect, r.elasticities["income"].elasticity
    assert me.shape == (60, 4)
    fd = finite_difference(model, batch, "income", None)
    # Source: common practice, central finite differences.
    np.testing.assert_allclose(me, fd, rtol=1e-5, atol=1e-10)
    # Point elasticity = dP_i/dz * z / P_i (definition, Train 2009, sec. 3.6).
    np.testing.assert_allclose(
        e * r.probabilities, me * batch.context[:, :1], rtol=1e-12, atol=1e-15
    )


@pytest.mark.parametrize("family", ["multinomial", "nested"])
def test_marginal_effects_of_an_attribute_sum_to_zero_over_alternatives(family, mnl, nested):
    model = mnl if family == "multinomial" else nested
    batch = commute_batch(model, 80, seed=6, p_unavailable=0.2)
    r = score(model, batch, ScoreOptions(elasticities=("fare", "income")))
    # Source: probabilities sum to one, so their derivatives sum to zero (common practice).
    np.testing.assert_allclose(r.elasticities["fare"].marginal_effect.sum(axis=1), 0, atol=1e-15)
    np.testing.assert_allclose(r.elasticities["income"].marginal_effect.sum(axis=1), 0, atol=1e-15)


def test_aggregate_shares_and_elasticities_use_sample_enumeration(nested):
    batch = commute_batch(nested, 300, seed=7, p_unavailable=0.3)
    r = score(nested, batch, ScoreOptions(elasticities=("fare", "income"), aggregate=True))
    w, p = batch.weights, r.probabilities
    # Source: Train 2009, sec. 3.6.1 (from memory): share_i = sum w P_i / sum w and
    # E_ij = sum_n w_n P_ni E_nij / sum_n w_n P_ni.
    np.testing.assert_allclose(r.aggregate.shares, (w[:, None] * p).sum(0) / w.sum())
    e = r.elasticities["fare"].elasticity
    for i in range(4):
        for j in range(4):
            expected = np.sum(w * p[:, i] * e[:, i, j]) / np.sum(w * p[:, i])
            assert r.aggregate.elasticities["fare"][i, j] == pytest.approx(expected, rel=1e-12)
    ez = r.elasticities["income"].elasticity
    expected = (w[:, None] * p * ez).sum(0) / (w[:, None] * p).sum(0)
    np.testing.assert_allclose(r.aggregate.elasticities["income"], expected, rtol=1e-12)


def test_unknown_elasticity_names_are_refused_with_their_position(mnl):
    batch = commute_batch(mnl, 5)
    with pytest.raises(ScoringError) as err:
        score(mnl, batch, ScoreOptions(elasticities=("fare", "colour", "fare")))
    assert [p.path for p in err.value.problems] == [
        "options.elasticities[1]",
        "options.elasticities[2]",
    ]
