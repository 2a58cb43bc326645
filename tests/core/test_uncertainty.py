"""Delta-method standard errors of probabilities and willingness-to-pay ratios.

Train (2009) section and equation numbers are cited from memory.
"""

from __future__ import annotations

import numpy as np
import pytest

from service.choice import (
    Batch,
    Coefficients,
    ScoreOptions,
    ScoringError,
    compile_model,
    score,
    willingness_to_pay,
)
from tests.core.conftest import (
    COMMUTE_ESTIMATES,
    TRANSIT_NESTS,
    commute_batch,
    commute_spec,
    model_from,
)
from tests.core.test_elasticities import simple


def random_covariance(k: int, seed: int, scale: float = 1e-3) -> np.ndarray:
    rng = np.random.default_rng(seed)
    a = rng.normal(size=(k, k))
    return scale * (a @ a.T + k * np.eye(k)) / k


def with_covariance(model, seed: int = 0, scale: float = 1e-3):
    names = model.coefficients.names
    cov = random_covariance(len(names), seed, scale)
    coefs = Coefficients.from_mapping(model.coefficients.as_mapping(), covariance=(names, cov))
    return compile_model(model.spec, coefs)


def numerical_jacobian(model, batch, h=1e-6):
    """dP/dbeta (N, J, K) by central differences of our own probabilities."""
    est = model.coefficients.as_mapping()
    cols = []
    for name in model.coefficients.names:
        probs = []
        for delta in (h, -h):
            bumped = dict(est, **{name: est[name] + delta})
            m = compile_model(model.spec, Coefficients.from_mapping(bumped))
            probs.append(score(m, batch).probabilities)
        cols.append((probs[0] - probs[1]) / (2 * h))
    return np.stack(cols, axis=-1)


def nested_commute():
    est = dict(COMMUTE_ESTIMATES, lambda_private=0.7, lambda_transit=0.45)
    return model_from(commute_spec("nested", TRANSIT_NESTS), est)


@pytest.mark.parametrize("family", ["multinomial", "nested"])
def test_probability_std_errors_are_the_delta_method_of_a_numerical_jacobian(family, mnl):
    model = with_covariance(mnl if family == "multinomial" else nested_commute(), seed=1)
    batch = commute_batch(model, 40, seed=2, p_unavailable=0.3)
    r = score(model, batch, ScoreOptions(std_errors=True))
    jac = numerical_jacobian(model, batch)
    cov = model.coefficients.covariance
    # Source: delta method, Var P = J Sigma J' (common practice), J by central differences
    # in every coefficient, nest scales included.
    expected = np.sqrt(np.einsum("njk,kl,njl->nj", jac, cov, jac))
    np.testing.assert_allclose(r.prob_std_errors, expected, rtol=1e-5, atol=1e-10)
    assert np.all(r.prob_std_errors[~batch.available] == 0)


@pytest.mark.parametrize("family", ["multinomial", "nested"])
def test_std_errors_of_an_alternative_whose_feature_overflows_are_exact_zeros(family, mnl):
    """Rail's fare x income interaction overflows to -inf (fare 1e10, only outside the range,
    a warning; income -1e300), so V_rail = -inf; the car's income term gives V_car ~ -1e298.
    Both have P = 0.  Their features must not be formed as inf * 0 (NaN and a RuntimeWarning,
    which this suite turns into an error)."""
    model = with_covariance(mnl if family == "multinomial" else nested_commute(), seed=6)
    batch = commute_batch(model, 6, seed=7)
    rail, car = model.alternatives.index("rail"), model.alternatives.index("car")
    x, z = batch.attributes.copy(), batch.context.copy()
    x[:3, rail, model.attributes.index("fare")] = 1e10
    z[:3, 0] = -1e300
    extreme = Batch(attributes=x, context=z, available=batch.available, weights=batch.weights)
    r = score(model, extreme, ScoreOptions(std_errors=True))
    assert np.all(r.probabilities[:3, [rail, car]] == 0)
    assert np.all(r.prob_std_errors[:3, [rail, car]] == 0)
    assert np.isfinite(r.prob_std_errors).all()
    # Source: Train 2009 eq. 3.6 (from memory): exp(-inf) = 0, so an alternative of utility
    # -inf is one that cannot be chosen: the others' errors are those of the same
    # situations with rail and car unavailable (the rows with finite inputs are untouched).
    avail = batch.available.copy()
    avail[:3, [rail, car]] = False
    without = Batch(
        attributes=batch.attributes, context=batch.context, available=avail, weights=batch.weights
    )
    expected = score(model, without, ScoreOptions(std_errors=True)).prob_std_errors
    np.testing.assert_array_equal(r.prob_std_errors[3:], expected[3:])
    np.testing.assert_allclose(r.prob_std_errors[:3], expected[:3], rtol=1e-12, atol=1e-15)
    # Source: delta method of a numerical Jacobian (common practice), as above.
    jac = numerical_jacobian(model, extreme)
    cov = model.coefficients.covariance
    delta = np.sqrt(np.einsum("njk,kl,njl->nj", jac, cov, jac))
    np.testing.assert_allclose(r.prob_std_errors, delta, rtol=1e-5, atol=1e-10)


def test_probability_std_errors_match_a_simulation_of_the_estimates(mnl):
    model = with_covariance(mnl, seed=3, scale=1e-8)
    batch = commute_batch(model, 5, seed=4)
    r = score(model, batch, ScoreOptions(std_errors=True))
    # Source: simulation, beta ~ N(estimates, Sigma) (Train 2009, sec. 9.2.2 style draws,
    # from memory); with a small Sigma the spread of P approaches the delta method.
    rng = np.random.default_rng(5)
    names = model.coefficients.names
    draws = rng.multivariate_normal(model.beta, model.coefficients.covariance, size=2000)
    sims = np.stack(
        [
            score(
                compile_model(
                    model.spec, Coefficients.from_mapping(dict(zip(names, d, strict=True)))
                ),
                batch,
            ).probabilities
            for d in draws
        ]
    )
    sd = sims.std(axis=0)
    # The sample sd of 2000 normal draws has relative standard error about 1/sqrt(4000).
    np.testing.assert_allclose(sd, r.prob_std_errors, rtol=0.1)


def test_std_errors_need_a_covariance_matrix(mnl):
    with pytest.raises(ScoringError) as err:
        score(mnl, commute_batch(mnl, 3), ScoreOptions(std_errors=True))
    assert err.value.problems[0].path == "options.std_errors"


def test_willingness_to_pay_is_a_coefficient_ratio_with_delta_method_errors():
    model = with_covariance(simple("multinomial"), seed=6)
    wtp = {w.coefficient: w for w in willingness_to_pay(model)}
    assert set(wtp) == {"asc_a", "asc_b", "asc_c"}
    cov = model.coefficients.covariance
    names = model.coefficients.names
    c = names.index("b_price")
    bc = model.beta[c]
    for name, w in wtp.items():
        k = names.index(name)
        bk = model.beta[k]
        # Source: WTP = -beta_k / beta_cost (Train 2009, sec. 2.5 / 3.8.2, from memory);
        # delta method for a ratio (common practice):
        # Var = (1/bc^2) [Var_k - 2 (bk/bc) Cov_kc + (bk/bc)^2 Var_c].
        var = (cov[k, k] - 2 * (bk / bc) * cov[k, c] + (bk / bc) ** 2 * cov[c, c]) / bc**2
        assert w.value == pytest.approx(-bk / bc, rel=1e-14)
        assert w.std_error == pytest.approx(np.sqrt(var), rel=1e-12)


def test_willingness_to_pay_without_covariance_has_no_std_error():
    wtp = willingness_to_pay(simple("nested"))
    assert {w.coefficient for w in wtp} == {"asc_a", "asc_b", "asc_c"}  # scales excluded
    assert all(w.std_error is None for w in wtp)


def test_willingness_to_pay_needs_one_generic_cost_coefficient(mnl):
    with pytest.raises(ScoringError):
        willingness_to_pay(mnl)  # rail's fare interacts with income
