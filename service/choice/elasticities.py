"""Point elasticities and marginal effects of choice probabilities.

With D_ij = d ln P_i / d V_j (:func:`log_probability_derivatives`):
- attribute a of alternative j:  dP_i/dx_ja = P_i D_ij dV_j/dx_ja,
  E_ij = D_ij (dV_j/dx_ja) x_ja.  For logit this is Train 2009 eq. 3.7 (from memory; own,
  beta x_i (1 - P_i)) and eq. 3.8 (cross, -beta x_j P_j) (from memory), for nested
  logit eq. 4.5-4.6 (from memory) in general form;
- context variable z:  dP_i/dz = P_i sum_j D_ij dV_j/dz,  E_i = z sum_j D_ij dV_j/dz.
Arrays here are internal (J, J, N) / (J, N); unavailable entries are exactly 0.

Train (2009) section and equation numbers are cited from memory.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from service.choice.batch import Batch
from service.choice.compiled import CompiledModel
from service.choice.probabilities import ChoiceState
from service.choice.utility import attribute_slopes, context_slopes


@dataclass(frozen=True, eq=False)
class Elasticities:
    """For an attribute (N, J, J) [i: probability of i, j: attribute of j]; for a context
    variable (N, J)."""

    elasticity: np.ndarray
    marginal_effect: np.ndarray


def attribute_elasticities(
    model: CompiledModel, batch: Batch, state: ChoiceState, d: np.ndarray, attribute: int
) -> tuple[np.ndarray, np.ndarray]:
    """(elasticity, marginal effect), each (J, J, N)."""
    avail = state.available
    slope = np.where(avail, attribute_slopes(model, batch, attribute), 0.0)
    used = avail & model.required[:, attribute][:, None]
    x = np.where(used, batch.attributes[:, :, attribute].T, 0.0)
    dp = d * slope[None]
    elasticity = dp * x[None]
    marginal = dp * state.probabilities[:, None, :]
    return elasticity, marginal


def context_elasticities(
    model: CompiledModel, batch: Batch, state: ChoiceState, d: np.ndarray, variable: int
) -> tuple[np.ndarray, np.ndarray]:
    """(elasticity, marginal effect), each (J, N)."""
    slope = np.where(state.available, context_slopes(model, batch, variable), 0.0)
    dlogp = np.einsum("ijn,jn->in", d, slope)
    return dlogp * batch.context[:, variable], dlogp * state.probabilities
