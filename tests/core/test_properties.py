"""Properties of logit probabilities that hold for every input (hypothesis).

Train (2009) section and equation numbers are cited from memory.
"""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from service.choice import Batch, Coefficients, ScoreOptions, compile_model, score, spec_from_dict

ALTS = ["a", "b", "c", "d", "e"]


def model(family: str, lam: tuple[float, float] = (1.0, 1.0)):
    """V_j = u_j: the batch carries the utilities themselves."""
    spec = {
        "name": "prop",
        "family": family,
        "alternatives": [{"id": a} for a in ALTS],
        "attributes": [{"name": "u"}],
        "utilities": {a: [{"coefficient": "one", "attribute": "u"}] for a in ALTS},
    }
    est = {"one": 1.0}
    if family == "nested":
        spec["nests"] = [
            {"id": "n1", "scale": "l1", "alternatives": ["a", "b", "c"]},
            {"id": "n2", "scale": "l2", "alternatives": ["d", "e"]},
        ]
        est.update(l1=lam[0], l2=lam[1])
    return compile_model(spec_from_dict(spec), Coefficients.from_mapping(est))


MNL = model("multinomial")
NESTED_ONE = model("nested")

utilities = arrays(
    np.float64, (3, 5), elements=st.floats(-1e4, 1e4, allow_nan=False, allow_subnormal=False)
)
availability = arrays(np.bool_, (3, 5)).map(lambda a: a | (np.arange(5) == 0))
scales = st.floats(0.05, 1.0)
shifts = st.floats(-500, 500, allow_nan=False)


def batch(u: np.ndarray, avail: np.ndarray) -> Batch:
    return Batch(u[:, :, None].copy(), np.zeros((len(u), 0)), avail, np.ones(len(u)))


@settings(max_examples=60, deadline=None)
@given(utilities, availability, scales, scales)
def test_probabilities_are_a_distribution_over_the_available(u, avail, l1, l2):
    for m in (MNL, model("nested", (l1, l2))):
        p = score(m, batch(u, avail)).probabilities
        # Source: probabilities of a discrete choice sum to 1 (Train 2009, sec. 2.2).
        np.testing.assert_allclose(p.sum(axis=1), 1.0, rtol=1e-12)
        assert np.all((p >= 0) & (p <= 1)) and np.all(p[~avail] == 0)


@settings(max_examples=60, deadline=None)
@given(utilities, availability, shifts, scales, scales)
def test_adding_a_constant_to_all_utilities_changes_no_probability(u, avail, c, l1, l2):
    for m in (MNL, model("nested", (l1, l2))):
        a = score(m, batch(u, avail))
        b = score(m, batch(u + c, avail))
        # Source: only differences in utility matter (Train 2009, sec. 2.5.1);
        # the logsum moves by the constant.
        np.testing.assert_allclose(a.probabilities, b.probabilities, rtol=1e-6, atol=1e-12)
        np.testing.assert_allclose(b.logsum - a.logsum, c, rtol=1e-9, atol=1e-7 * 1e4)


@settings(max_examples=60, deadline=None)
@given(arrays(np.float64, (4, 5), elements=st.floats(-30, 30)), availability)
def test_ratio_of_two_probabilities_is_independent_of_other_alternatives(u, avail):
    avail = np.vstack([avail, avail[:1]])
    avail[:, 1] = True
    full = score(MNL, batch(u, np.ones_like(avail))).probabilities
    part = score(MNL, batch(u, avail)).probabilities
    # Source: independence from irrelevant alternatives (IIA), Train 2009, sec. 3.3.2:
    # P_a / P_b = exp(V_a - V_b) whatever else is available.
    np.testing.assert_allclose(part[:, 0] / part[:, 1], full[:, 0] / full[:, 1], rtol=1e-9)
    np.testing.assert_allclose(part[:, 0] / part[:, 1], np.exp(u[:, 0] - u[:, 1]), rtol=1e-9)


@settings(max_examples=60, deadline=None)
@given(utilities, availability)
def test_nested_logit_with_all_scales_one_equals_multinomial_logit(u, avail):
    a = score(NESTED_ONE, batch(u, avail))
    b = score(MNL, batch(u, avail))
    # Source: Train 2009, sec. 4.2.1: lambda_k = 1 for all k gives standard logit.
    np.testing.assert_allclose(a.probabilities, b.probabilities, rtol=1e-9, atol=1e-300)
    np.testing.assert_allclose(a.logsum, b.logsum, rtol=1e-12, atol=1e-10)


@settings(max_examples=40, deadline=None)
@given(
    arrays(np.float64, (3, 5), elements=st.floats(-50, 50)),
    availability,
    scales,
    scales,
)
def test_marginal_effects_sum_to_zero_and_match_a_utility_shift(u, avail, l1, l2):
    m = model("nested", (l1, l2))
    r = score(m, batch(u, avail), ScoreOptions(elasticities=("u",)))
    me = r.elasticities["u"].marginal_effect
    # Source: sum_i P_i = 1 for every x, so sum_i dP_i/dx_j = 0 (common practice).
    np.testing.assert_allclose(me.sum(axis=1), 0.0, atol=1e-12)
    # Source: common practice, central difference in u_1 (V_j = u_j).
    h = 1e-6
    up, down = u.copy(), u.copy()
    up[:, 1] += h
    down[:, 1] -= h
    fd = (score(m, batch(up, avail)).probabilities - score(m, batch(down, avail)).probabilities) / (
        2 * h
    )
    np.testing.assert_allclose(me[:, :, 1], fd, rtol=1e-5, atol=1e-6)
