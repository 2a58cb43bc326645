"""Choice probabilities and logsums against SciPy, published formulas and the RUM itself.

Train (2009) section and equation numbers are cited from memory.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy import special, stats

from service.choice import EULER_GAMMA, Batch, ScoreOptions, check_batch, score
from tests.core.conftest import commute_batch, commute_model, model_from, reference_utilities


def masked(v: np.ndarray, avail: np.ndarray) -> np.ndarray:
    return np.where(avail, v, -np.inf)


def test_multinomial_probabilities_equal_scipy_softmax(mnl):
    batch = commute_batch(mnl, 500, seed=1, p_unavailable=0.3)
    result = score(mnl, check_batch(mnl, batch).batch)
    v = masked(reference_utilities(mnl, batch), batch.available)
    # Source: scipy.special.softmax of the utilities (Train 2009, eq. 3.6, from memory).
    np.testing.assert_allclose(result.probabilities, special.softmax(v, axis=1), rtol=1e-12)
    # Source: scipy.special.logsumexp (the logsum, Train 2009 sec. 3.5).
    np.testing.assert_allclose(result.logsum, special.logsumexp(v, axis=1), rtol=1e-12)
    np.testing.assert_allclose(result.expected_max_utility, result.logsum + np.euler_gamma)


def test_unavailable_alternatives_get_exactly_zero_probability(mnl, nested):
    for model in (mnl, nested):
        batch = commute_batch(model, 300, seed=2, p_unavailable=0.5)
        result = score(model, batch)
        assert np.all(result.probabilities[~batch.available] == 0.0)
        assert np.all(result.probabilities[batch.available] > 0.0)
        # Probabilities sum to one (common practice: they are a distribution).
        np.testing.assert_allclose(result.probabilities.sum(axis=1), 1.0, rtol=1e-13)


def test_unavailable_alternatives_may_carry_missing_values(mnl):
    batch = commute_batch(mnl, 50, seed=3, p_unavailable=0.5)
    x = batch.attributes.copy()
    x[~batch.available] = np.nan
    gappy = Batch(x, batch.context, batch.available, batch.weights)
    assert check_batch(mnl, gappy).ok
    np.testing.assert_allclose(score(mnl, gappy).probabilities, score(mnl, batch).probabilities)


@pytest.mark.parametrize("bad", [0.0, -5.0, -2.0, np.inf, -np.inf, np.nan])
def test_an_unavailable_alternative_outside_every_domain_leaves_the_others_alone(mnl, bad):
    """Its cells (log time <= 0, log1p wait <= -1, infinite) give non-finite features that
    must stay inside its own utility (common practice: an unavailable alternative takes no
    part in the choice)."""
    batch = commute_batch(mnl, 40, seed=4, p_unavailable=0.5)
    x = batch.attributes.copy()
    x[~batch.available] = bad
    wild = Batch(x, batch.context, batch.available, batch.weights)
    assert check_batch(mnl, wild).ok
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        result = score(mnl, wild)
    np.testing.assert_array_equal(result.probabilities, score(mnl, batch).probabilities)


def test_a_model_of_context_variables_only_is_a_logit_in_them():
    """No attributes at all: V_b = asc + beta * income, so P_b = logistic(V_b - 0)
    (Train 2009, sec. 3.1, from memory; scipy.special.expit as the reference)."""
    spec = {
        "name": "upgrade",
        "family": "binary",
        "alternatives": [{"id": "stay"}, {"id": "upgrade"}],
        "attributes": [],
        "context": [{"name": "income"}],
        "utilities": {
            "stay": [],
            "upgrade": [
                {"coefficient": "asc_upgrade"},
                {"coefficient": "b_income", "context": "income"},
            ],
        },
    }
    model = model_from(spec, {"asc_upgrade": -0.7, "b_income": 0.02})
    income = np.array([[10.0], [45.0], [120.0]])
    batch = Batch(np.zeros((3, 2, 0)), income, np.ones((3, 2), bool), np.ones(3))
    p = score(model, check_batch(model, batch).batch).probabilities
    np.testing.assert_allclose(p[:, 1], special.expit(-0.7 + 0.02 * income[:, 0]), rtol=1e-14)


def test_binary_logit_is_the_logistic_cdf_of_the_utility_difference():
    spec = {
        "name": "renew",
        "family": "binary",
        "alternatives": [{"id": "renew"}, {"id": "lapse"}],
        "attributes": [{"name": "price", "role": "cost"}],
        "context": [{"name": "tenure"}],
        "utilities": {
            "renew": [
                {"coefficient": "asc"},
                {"coefficient": "b_price", "attribute": "price"},
                {"coefficient": "b_tenure", "context": "tenure"},
            ],
            "lapse": [{"coefficient": "b_price", "attribute": "price"}],
        },
    }
    model = model_from(spec, {"asc": 0.8, "b_price": -0.07, "b_tenure": 0.3})
    rng = np.random.default_rng(4)
    n = 400
    x = rng.uniform(0, 40, (n, 2, 1))
    z = rng.uniform(0, 10, (n, 1))
    batch = Batch(x, z, np.ones((n, 2), bool), np.ones(n))
    p = score(model, batch).probabilities
    dv = 0.8 - 0.07 * (x[:, 0, 0] - x[:, 1, 0]) + 0.3 * z[:, 0]
    # Source: the difference of two iid type-I extreme value errors is logistic
    # (Train 2009, sec. 3.1), so P(renew) = scipy.stats.logistic.cdf(V_renew - V_lapse).
    np.testing.assert_allclose(p[:, 0], stats.logistic.cdf(dv), rtol=1e-12)


def nested_reference(v: np.ndarray, avail: np.ndarray, nests, lam) -> np.ndarray:
    """Train 2009, eq. 4.2 (from memory) written out literally (with availability)."""
    e = np.where(avail, np.exp(v), 0.0)
    p = np.zeros_like(v)
    sums = [np.sum(e[:, m] ** (1 / lam[k]), axis=1) for k, m in enumerate(nests)]
    denom = sum(s ** lam[k] for k, s in enumerate(sums))
    for k, members in enumerate(nests):
        for i in members:
            with np.errstate(divide="ignore", invalid="ignore"):
                pi = e[:, i] ** (1 / lam[k]) * sums[k] ** (lam[k] - 1) / denom
            p[:, i] = np.where(e[:, i] > 0, pi, 0.0)
    return p, np.log(denom)


def test_nested_logit_probabilities_follow_the_closed_form(nested):
    batch = commute_batch(nested, 400, seed=5, p_unavailable=0.4)
    result = score(nested, batch)
    v = reference_utilities(nested, batch)
    # car, bike | bus, rail with lambda 0.7 and 0.45 (the model's nests).
    p, ls = nested_reference(v, batch.available, [[0, 3], [1, 2]], [0.7, 0.45])
    # Source: Train 2009, eq. 4.2 (from memory); logsum = ln sum_k (sum_{j in k} e^{V_j/l_k})^{l_k}
    # (Train 2009, sec. 4.2.3, eq. 4.7 from memory).
    np.testing.assert_allclose(result.probabilities, p, rtol=1e-11)
    np.testing.assert_allclose(result.logsum, ls, rtol=1e-11)


def test_nested_logit_with_all_scales_one_equals_multinomial(mnl):
    one = commute_model("nested", scales=(1.0, 1.0))
    batch = commute_batch(mnl, 300, seed=6, p_unavailable=0.3)
    a, b = score(one, batch), score(mnl, batch)
    # Source: Train 2009, sec. 4.2.1: with lambda_k = 1 nested logit reduces to logit.
    np.testing.assert_allclose(a.probabilities, b.probabilities, rtol=1e-12)
    np.testing.assert_allclose(a.logsum, b.logsum, rtol=1e-12)


def test_a_degenerate_nest_of_one_alternative_ignores_its_scale():
    base = dict(commute_model().coefficients.as_mapping(), lambda_private=0.6, lambda_transit=0.5)
    from tests.core.conftest import commute_spec

    nests = [
        {"id": "car", "scale": "lambda_private", "alternatives": ["car"]},
        {"id": "rest", "scale": "lambda_transit", "alternatives": ["bus", "rail", "bike"]},
    ]
    a = model_from(commute_spec("nested", nests), base)
    b = model_from(commute_spec("nested", nests), dict(base, lambda_private=1.0))
    batch = commute_batch(a, 100, seed=7)
    # Source: Train 2009, sec. 4.2.2 (from memory): a nest of one alternative has
    # P(i | nest) = 1 and inclusive value V_i / l, so l * I = V_i whatever l is.
    np.testing.assert_allclose(score(a, batch).probabilities, score(b, batch).probabilities)


def direct_model(family: str):
    """V_j = u_j exactly: one generic coefficient 1 on a single attribute."""
    alts = ["a", "b", "c", "d"]
    spec = {
        "name": "direct",
        "family": family,
        "alternatives": [{"id": a} for a in alts],
        "attributes": [{"name": "u"}],
        "utilities": {a: [{"coefficient": "one", "attribute": "u"}] for a in alts},
    }
    est = {"one": 1.0}
    if family == "nested":
        spec["nests"] = [
            {"id": "n1", "scale": "l1", "alternatives": ["a", "b"]},
            {"id": "n2", "scale": "l2", "alternatives": ["c", "d"]},
        ]
        est.update(l1=0.3, l2=0.8)
    return model_from(spec, est)


@pytest.mark.parametrize("family", ["multinomial", "nested"])
def test_extreme_utilities_give_exact_zero_one_probabilities_without_warnings(family):
    model = direct_model(family)
    # Utilities of +-1e4 and spreads of 1e3 (common practice: log-sum-exp with a max shift).
    u = np.array(
        [
            [1e4, 1e4 - 1e3, -1e4, 0.0],
            [-1e4, -1e4 + 1e3, -1e4, -1e4],
            [-1e4, -1e4, 1e4, 1e4 - 1e3],
            [0.0, -1e3, 1e3, -1e4],
        ]
    )
    n = len(u)
    batch = Batch(u[:, :, None], np.zeros((n, 0)), np.ones((n, 4), bool), np.ones(n))
    options = ScoreOptions(elasticities=("u",), aggregate=True)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        result = score(model, batch, options)
    winners = [0, 1, 2, 2]
    expected = np.zeros((n, 4))
    expected[np.arange(n), winners] = 1.0
    np.testing.assert_array_equal(result.probabilities, expected)
    # The logsum of a dominated set is its maximum to double precision (common practice).
    if family == "multinomial":
        np.testing.assert_array_equal(result.logsum, u.max(axis=1))
    assert np.all(np.isfinite(result.logsum))
    for e in result.elasticities.values():
        assert np.all(np.isfinite(e.elasticity)) and np.all(np.isfinite(e.marginal_effect))


@pytest.mark.parametrize("family", ["multinomial", "nested"])
def test_utilities_near_the_largest_float_score_without_warnings(family):
    """Finite utilities of 1e307 in many situations: any sum across situations would
    overflow, so nothing may sum them (warnings are errors here).  The probability of a
    dominant alternative is 1 and the logsum its utility (common practice: log-sum-exp)."""
    model = direct_model(family)
    n = 40
    u = np.tile([1e307, 0.0, -1e307, 1.0], (n, 1))
    batch = Batch(u[:, :, None], np.zeros((n, 0)), np.ones((n, 4), bool), np.ones(n))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        result = score(model, check_batch(model, batch).batch)
    np.testing.assert_array_equal(result.probabilities, np.tile([1.0, 0, 0, 0], (n, 1)))
    if family == "multinomial":
        np.testing.assert_array_equal(result.logsum, np.full(n, 1e307))
    assert np.isfinite(result.logsum).all()


def test_gumbel_simulation_of_the_random_utility_model_matches():
    # Source: simulation of the random utility model U = V + e with iid standard Gumbel e
    # (variance pi^2/6): choice frequencies estimate P, the mean of max U estimates
    # logsum + Euler's constant (Train 2009, sec. 3.1 and 3.5). Multinomial only: the
    # nested errors are not iid.
    model = commute_model()
    batch = commute_batch(model, 4, seed=8, p_unavailable=0.3)
    result = score(model, batch)
    v = masked(reference_utilities(model, batch), batch.available)
    rng = np.random.default_rng(9)
    r = 200_000
    for n in range(batch.size):
        u = v[n] + rng.gumbel(size=(r, v.shape[1]))
        freq = np.bincount(u.argmax(axis=1), minlength=v.shape[1]) / r
        p = result.probabilities[n]
        se = np.sqrt(p * (1 - p) / r)
        assert np.all(np.abs(freq - p) <= 5 * se + 1e-12), (freq, p)
        best = u.max(axis=1)
        assert abs(best.mean() - result.expected_max_utility[n]) <= 5 * best.std() / np.sqrt(r)
    # Euler's constant to 16 digits (from memory).
    assert pytest.approx(0.5772156649015329, abs=1e-15) == EULER_GAMMA


def positive_stable(rng: np.random.Generator, a: float, size: int) -> np.ndarray:
    """S with E exp(-tS) = exp(-t^a), 0 < a < 1 (Kanter's representation, from memory;
    the test below checks the Laplace transform before relying on it)."""
    u = rng.uniform(0.0, np.pi, size)
    w = rng.exponential(size=size)
    return np.sin(a * u) / np.sin(u) ** (1 / a) * (np.sin((1 - a) * u) / w) ** ((1 - a) / a)


def test_simulated_nested_logit_errors_reproduce_probabilities_and_logsum(nested):
    # Source: simulation of the nested random utility model. Errors of nest k are
    # e_j = l_k (ln S_k + g_j) with g_j iid standard Gumbel and S_k positive stable of index
    # l_k, so that P(e <= x) = exp(-(sum_j exp(-x_j / l_k))^l_k), the generalised extreme
    # value distribution behind nested logit (Train 2009, sec. 4.2.1, from memory).
    rng = np.random.default_rng(10)
    r = 200_000
    scales = {0: 0.7, 1: 0.45}  # private {car, bike}, transit {bus, rail}
    for lam in scales.values():
        s = positive_stable(rng, lam, r)
        for t in (0.5, 1.0, 2.0):
            # The Laplace transform of a sample mean of values in [0, 1]: sd <= 0.5/sqrt(r).
            assert abs(np.exp(-t * s).mean() - np.exp(-(t**lam))) <= 5 * 0.5 / np.sqrt(r)
    batch = commute_batch(nested, 3, seed=11, p_unavailable=0.3)
    result = score(nested, batch)
    v = masked(reference_utilities(nested, batch), batch.available)
    nest_of = np.array([0, 1, 1, 0])  # car, bus, rail, bike
    for n in range(batch.size):
        e = np.empty((r, 4))
        for k, lam in scales.items():
            members = np.flatnonzero(nest_of == k)
            log_s = np.log(positive_stable(rng, lam, r))[:, None]
            e[:, members] = lam * (log_s + rng.gumbel(size=(r, len(members))))
        u = v[n] + e
        freq = np.bincount(u.argmax(axis=1), minlength=4) / r
        p = result.probabilities[n]
        se = np.sqrt(p * (1 - p) / r)
        assert np.all(np.abs(freq - p) <= 5 * se + 1e-12), (freq, p)
        best = u.max(axis=1)
        assert abs(best.mean() - result.expected_max_utility[n]) <= 5 * best.std() / np.sqrt(r)
