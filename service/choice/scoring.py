"""Scoring a checked batch: every requested quantity in one vectorised pass.

Public arrays are situation-major ((N, J), (N, J, J)); they are transposed views of the
core's alternative-major arrays, so a column (one alternative over all situations) is
contiguous.

Train (2009) section and equation numbers are cited from memory.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from service.choice.aggregate import AggregateResult, aggregate_elasticity, shares
from service.choice.batch import Batch
from service.choice.compiled import CompiledModel
from service.choice.elasticities import (
    Elasticities,
    attribute_elasticities,
    context_elasticities,
)
from service.choice.errors import ScoringError
from service.choice.probabilities import choice_probabilities, log_probability_derivatives
from service.choice.spec import Problem
from service.choice.uncertainty import probability_std_errors, require_covariance
from service.choice.utility import utilities
from service.choice.welfare import cost_effect, marginal_utility_of_money

EULER_GAMMA = float(np.euler_gamma)
"""Mean of the standard type-I extreme value distribution (Train 2009, sec. 3.5)."""


@dataclass(frozen=True)
class ScoreOptions:
    probabilities: bool = True
    logsum: bool = True
    """The logsum and the expected maximum utility."""
    surplus: bool = False
    elasticities: tuple[str, ...] = ()
    """Attribute or context-variable names."""
    aggregate: bool = False
    std_errors: bool = False


@dataclass(frozen=True, eq=False)
class ScoreResult:
    probabilities: np.ndarray | None
    """(N, J); unavailable alternatives exactly 0."""
    logsum: np.ndarray | None
    """(N,)"""
    expected_max_utility: np.ndarray | None
    """(N,): logsum + Euler's constant (iid standard Gumbel errors, Train 2009 sec. 3.5)."""
    surplus: np.ndarray | None = None
    """(N,): logsum / alpha in money units, alpha = -dV/d(cost)."""
    elasticities: dict[str, Elasticities] = field(default_factory=dict)
    aggregate: AggregateResult | None = None
    prob_std_errors: np.ndarray | None = None
    """(N, J): delta-method standard errors of the probabilities."""


def validate_options(model: CompiledModel, options: ScoreOptions) -> None:
    """Refuse options this model cannot serve (:class:`ScoringError`), before any work."""
    problems: list[Problem] = []
    for i, name in enumerate(options.elasticities):
        if name not in model.attributes and name not in model.context:
            problems.append(
                Problem(
                    f"options.elasticities[{i}]",
                    f"{name!r} is neither an attribute nor a context variable of the model",
                )
            )
        elif name in options.elasticities[:i]:
            problems.append(Problem(f"options.elasticities[{i}]", f"{name!r} is repeated"))
    if options.surplus:
        try:
            cost_effect(model, "options.surplus")
        except ScoringError as e:
            problems.extend(e.problems)
    if options.std_errors:
        try:
            require_covariance(model, "options.std_errors")
        except ScoringError as e:
            problems.extend(e.problems)
    if problems:
        raise ScoringError(problems)


def score(
    model: CompiledModel, batch: Batch, options: ScoreOptions = ScoreOptions()
) -> ScoreResult:
    """Score a batch that :func:`check_batch` accepted (its ``.batch``).

    Probabilities and logsums: :func:`choice_probabilities`; elasticities:
    :mod:`service.choice.elasticities`; aggregates by sample enumeration.
    """
    validate_options(model, options)
    if batch.size == 0:
        raise ScoringError([Problem("situations", "the batch has no situations")])
    if options.aggregate and not batch.weights.max() > 0:  # checked weights are >= 0
        raise ScoringError([Problem("weights", "aggregation needs a positive sum of weights")])
    alpha = marginal_utility_of_money(model, batch) if options.surplus else None
    available = batch.available.T
    state = choice_probabilities(model, utilities(model, batch), available)
    need_d = bool(options.elasticities) or options.std_errors
    d = log_probability_derivatives(model, state) if need_d else None

    internal: dict[str, np.ndarray] = {}
    elasticities: dict[str, Elasticities] = {}
    for name in options.elasticities:
        assert d is not None
        if name in model.attributes:
            e, me = attribute_elasticities(model, batch, state, d, model.attribute_index(name))
            public = Elasticities(e.transpose(2, 0, 1), me.transpose(2, 0, 1))
        else:
            e, me = context_elasticities(model, batch, state, d, model.context.index(name))
            public = Elasticities(e.T, me.T)
        internal[name] = e
        elasticities[name] = public

    p = state.probabilities
    aggregate = None
    if options.aggregate:
        w = batch.weights
        aggregate = AggregateResult(
            shares=shares(p, w),
            elasticities={k: aggregate_elasticity(p, w, e) for k, e in internal.items()},
        )
    std = None
    if options.std_errors:
        assert d is not None
        std = probability_std_errors(model, batch, state, d).T
    logsum = state.logsum
    return ScoreResult(
        probabilities=p.T if options.probabilities else None,
        logsum=logsum if options.logsum else None,
        expected_max_utility=logsum + EULER_GAMMA if options.logsum else None,
        surplus=logsum / alpha if alpha is not None else None,
        elasticities=elasticities,
        aggregate=aggregate,
        prob_std_errors=std,
    )
