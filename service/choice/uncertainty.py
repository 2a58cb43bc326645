"""Standard errors by the delta method: Var g(beta) ~= grad g' Sigma grad g (common practice).

Probabilities: dP_i/dbeta_k = P_i (sum_j D_ij dV_j/dbeta_k + d ln P_i / d lambda_k), with
D from :func:`log_probability_derivatives`.  For nested logit, differentiating Train 2009
eq. 4.2 (from memory) in the scale lambda_m of nest m (i in nest k, Vbar_m = sum_{j in m} P(j|m) V_j):
  d ln P_i / d lambda_m = [m = k] (-V_i/l^2 + I_m - (l - 1) Vbar_m / l^2)
                          - P(m) (I_m - Vbar_m / l_m).
Willingness to pay: w_k = -beta_k / beta_cost, grad = (-1/beta_cost, beta_k/beta_cost^2).

An alternative with P_j = 0 (exp underflow, or V_j = -inf from an overflowing feature) moves
no probability: dP_i/dV_j = P_i D_ij = 0 for every i (Train 2009 sec. 3.6, from memory:
dP_i/dV_j = -P_i P_j, dP_j/dV_j = P_j (1 - P_j)).  Its features and its row are therefore
left out (exact zeros) instead of being formed as inf * 0.

Train (2009) section and equation numbers are cited from memory.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from service.choice.batch import Batch
from service.choice.compiled import CompiledModel
from service.choice.errors import ScoringError
from service.choice.probabilities import ChoiceState
from service.choice.spec import Problem
from service.choice.utility import utility_design
from service.choice.welfare import cost_effect


def require_covariance(model: CompiledModel, path: str) -> np.ndarray:
    cov = model.coefficients.covariance
    if cov is None:
        raise ScoringError([Problem(path, "the model version has no covariance matrix")])
    return cov


def scale_log_derivatives(model: CompiledModel, state: ChoiceState) -> np.ndarray:
    """d ln P_i / d beta_k through the nest scales (K, J, N); 0 for a multinomial model."""
    n_j, n = state.probabilities.shape
    out = np.zeros((len(model.beta), n_j, n))
    if not model.nested:
        return out
    assert state.conditional is not None and state.inclusive is not None
    assert state.nest_probabilities is not None and state.utilities is not None
    # P(j|m) V_j -> 0 as V_j -> -inf: alternatives with P(j|m) = 0 take no part (their own
    # term is zeroed by P_j = 0 in probability_gradient).
    v = np.where(state.conditional > 0, state.utilities, 0.0)
    for m, k in enumerate(model.nest_scale_index):
        lam = model.nest_scales[m]
        members = model.nest_of == m
        pm = state.nest_probabilities[m]
        live = pm > 0
        incl = np.where(live, state.inclusive[m], 0.0)
        vbar = (state.conditional[members] * v[members]).sum(axis=0)
        top = np.where(live, pm * (incl - vbar / lam), 0.0)
        own = -v[members] / lam**2 + incl - (lam - 1.0) * vbar / lam**2
        out[k] -= top
        out[k, members] += np.where(state.available[members], own, 0.0)
    return out


def probability_gradient(
    model: CompiledModel, batch: Batch, state: ChoiceState, d: np.ndarray
) -> np.ndarray:
    """dP_i / dbeta_k (K, J, N) = P_i dln P_i/dbeta_k; exactly 0 where P_i = 0."""
    live = state.probabilities > 0
    # Features of an alternative with P_j = 0 may overflow (x * z = inf); they are masked.
    with np.errstate(over="ignore", invalid="ignore"):
        design = utility_design(model, batch)
    design = np.where(live[None], design, 0.0)
    dlogp = np.einsum("ijn,kjn->kin", d, design) + scale_log_derivatives(model, state)
    p = np.broadcast_to(state.probabilities[None], dlogp.shape)
    return np.multiply(dlogp, p, out=np.zeros_like(dlogp), where=live[None])


def probability_std_errors(
    model: CompiledModel, batch: Batch, state: ChoiceState, d: np.ndarray
) -> np.ndarray:
    """Delta-method standard errors of P (J, N)."""
    cov = require_covariance(model, "options.std_errors")
    grad = probability_gradient(model, batch, state, d)
    var = np.einsum("kin,kl,lin->in", grad, cov, grad)
    return np.sqrt(np.maximum(var, 0.0))


@dataclass(frozen=True)
class WillingnessToPay:
    """-beta_k / beta_cost: money units per unit of what coefficient k multiplies."""

    coefficient: str
    value: float
    std_error: float | None


def willingness_to_pay(model: CompiledModel) -> list[WillingnessToPay]:
    """WTP of every utility coefficient other than the cost coefficient and nest scales.

    Needs one generic cost coefficient with no context interaction (then the ratio is a
    single number); the standard error needs the covariance matrix (else None).
    """
    effect = cost_effect(model, path="willingness_to_pay")
    if len(effect.pairs) != 1 or effect.pairs[0][1] is not None:
        raise ScoringError(
            [
                Problem(
                    "willingness_to_pay",
                    "needs a single cost coefficient without context interactions",
                )
            ]
        )
    names = model.coefficients.names
    c = names.index(effect.pairs[0][0])
    bc = float(model.beta[c])
    scales = {int(k) for k in model.nest_scale_index}
    cov = model.coefficients.covariance
    out = []
    for k in dict.fromkeys(int(i) for i in model.terms.coefficient):
        if k == c or k in scales:
            continue
        bk = float(model.beta[k])
        se = None
        if cov is not None:
            g = np.array([-1.0 / bc, bk / bc**2])
            sub = cov[np.ix_([k, c], [k, c])]
            se = float(np.sqrt(max(g @ sub @ g, 0.0)))
        out.append(WillingnessToPay(coefficient=names[k], value=-bk / bc, std_error=se))
    return out
