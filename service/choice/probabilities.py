"""Logit and nested logit probabilities and logsums, stable at extreme utilities.

All arrays are alternative-major, (J, N).  Unavailable alternatives have utility -inf,
probability exactly 0 and take no part in any sum.  Every exponent is shifted by its
maximum (log-sum-exp; common practice), so utilities of +-1e4 neither overflow nor give NaN.

Train (2009) section and equation numbers are cited from memory.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from service.choice.batch import BatchProblem
from service.choice.compiled import CompiledModel
from service.choice.errors import ScoringError
from service.choice.spec import Problem

MAX_LISTED = 10
"""At most this many situations are named by :class:`UtilityNotFinite`."""


class UtilityNotFinite(ScoringError):
    """Situations that cannot be scored although their inputs passed the checks: an input
    value so large that a utility overflows (NaN or +inf), or no available alternative in an
    unchecked batch.  ``.situations`` are batch problems (situation index, field), so the
    caller names them in its own request form as it names :func:`check_batch` findings."""

    def __init__(self, situations: Sequence[BatchProblem], count: int | None = None):
        self.situations = tuple(situations)
        self.count = len(self.situations) if count is None else count
        """How many situations fail (only the first :data:`MAX_LISTED` are listed)."""
        super().__init__(
            [Problem(f"situations[{p.situation}]", p.message) for p in self.situations]
        )


@dataclass(frozen=True, eq=False)
class ChoiceState:
    """Probabilities and the intermediate quantities derivatives need."""

    probabilities: np.ndarray
    """P (J, N)."""
    logsum: np.ndarray
    """(N,): ln sum_j exp V_j (MNL) or ln sum_m exp(lambda_m I_m) (nested)."""
    available: np.ndarray
    """(J, N) bool."""
    utilities: np.ndarray | None = None
    """Nested: V (J, N) with -inf where unavailable (multinomial: consumed in place)."""
    conditional: np.ndarray | None = None
    """Nested: P(j | nest of j) (J, N)."""
    inclusive: np.ndarray | None = None
    """Nested: I_m = ln sum_{j in m} exp(V_j / lambda_m) (M, N), -inf for an empty nest."""
    nest_probabilities: np.ndarray | None = None
    """Nested: P(m) (M, N)."""


def choice_probabilities(model: CompiledModel, v: np.ndarray, available: np.ndarray) -> ChoiceState:
    """P and logsum from V (J, N) (overwritten) and availability (J, N).

    Multinomial / binary logit (Train 2009, eq. 3.6, from memory): P_i = exp V_i / sum_j exp V_j.
    Nested logit (Train 2009, eq. 4.2, from memory): P_i = exp(V_i/l_k) (sum_{j in k} exp(V_j/l_k))^(l_k-1)
    / sum_m (sum_{j in m} exp(V_j/l_m))^(l_m), computed as P(k) * P(i | k) (sec. 4.2.3).
    Raises :class:`UtilityNotFinite` if a situation has no available alternative, or an
    available alternative with a NaN or +inf utility (an unchecked batch, or overflow).
    """
    np.copyto(v, -np.inf, where=~available)
    top = v.max(axis=0)
    if not np.isfinite(top).all():
        bad = np.flatnonzero(~np.isfinite(top))
        listed = [_not_finite(model, v, available, int(n)) for n in bad[:MAX_LISTED]]
        raise UtilityNotFinite(listed, int(bad.size))
    return _nested(model, v, available) if model.nested else _multinomial(v, available, top)


def _not_finite(model: CompiledModel, v: np.ndarray, available: np.ndarray, n: int) -> BatchProblem:
    """Why situation ``n`` has no finite maximum utility, naming the alternatives at fault."""
    if not available[:, n].any():
        return BatchProblem(n, ("available",), "no alternative is available")
    wrong = available[:, n] & ~(v[:, n] < np.inf)  # NaN or +inf
    if not wrong.any():
        wrong = available[:, n]  # every available utility is -inf
    names = ", ".join(model.alternatives[j] for j in np.flatnonzero(wrong))
    return BatchProblem(n, (), f"a utility is not finite ({names}): an input value overflows")


def _multinomial(
    v: np.ndarray, available: np.ndarray, top: np.ndarray | None = None
) -> ChoiceState:
    """In place: ``v`` becomes P; ``top`` is the maximum of ``v`` over alternatives when it
    is known and finite in every situation (else it is computed, -inf shifted by 0)."""
    if top is not None:
        return _shifted_softmax(v, available, top)
    m = v.max(axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):  # a situation with all -inf
        return _shifted_softmax(v, available, np.where(np.isfinite(m), m, 0.0))


def _shifted_softmax(v: np.ndarray, available: np.ndarray, shift: np.ndarray) -> ChoiceState:
    """P = exp(V - shift) / sum exp(V - shift), logsum = ln sum exp(V - shift) + shift (in
    place on ``v``).  With shift the finite maximum, the largest term is exp(0) = 1, so the
    sum is >= 1: exp never overflows and nothing divides by zero (log-sum-exp; common
    practice).  Utilities more than the largest float apart make V - shift overflow to
    -inf, a probability of exactly 0 (NumPy warns of the overflow)."""
    p = v
    p -= shift
    np.exp(p, out=p)
    s = p.sum(axis=0)
    p /= s
    logsum = np.log(s)
    logsum += shift
    return ChoiceState(probabilities=p, logsum=logsum, available=available)


def _nested(model: CompiledModel, v: np.ndarray, available: np.ndarray) -> ChoiceState:
    n_m, n = len(model.nest_ids), v.shape[1]
    lam = model.nest_scales
    conditional = np.zeros_like(v)
    inclusive = np.empty((n_m, n))
    for m in range(n_m):
        members = np.flatnonzero(model.nest_of == m)
        u = v[members] / lam[m]
        top = u.max(axis=0)
        live = np.isfinite(top)
        shift = np.where(live, top, 0.0)
        e = np.exp(u - shift)
        s = e.sum(axis=0)
        safe = np.where(live, s, 1.0)
        conditional[members] = e / safe
        inclusive[m] = np.where(live, shift + np.log(safe), -np.inf)
    scaled = lam[:, None] * inclusive
    nest_p = _multinomial(scaled, np.isfinite(scaled))
    p = nest_p.probabilities[model.nest_of] * conditional
    return ChoiceState(
        probabilities=p,
        logsum=nest_p.logsum,
        utilities=v,
        available=available,
        conditional=conditional,
        inclusive=inclusive,
        nest_probabilities=nest_p.probabilities,
    )


def log_probability_derivatives(model: CompiledModel, state: ChoiceState) -> np.ndarray:
    """D[i, j] = d ln P_i / d V_j, (J, J, N); 0 where i or j is unavailable.

    Logit (Train 2009, sec. 3.6): D_ij = delta_ij - P_j.  Nested logit (differentiating
    eq. 4.2, from memory; i in nest k):  D_ij = delta_ij / l_k + [j in k] (1 - 1/l_k) P(j | k) - P_j.
    """
    p, avail = state.probabilities, state.available
    n_j = p.shape[0]
    d = np.repeat(-p[None], n_j, axis=0)
    if model.nested:
        assert state.conditional is not None
        lam_alt = model.nest_scales[model.nest_of]
        same = model.nest_of[:, None] == model.nest_of[None, :]
        within = (1.0 - 1.0 / lam_alt)[:, None, None] * state.conditional[None]
        d += np.where(same[:, :, None], within, 0.0)
        d[np.arange(n_j), np.arange(n_j)] += (1.0 / lam_alt)[:, None]
    else:
        d[np.arange(n_j), np.arange(n_j)] += 1.0
    d *= avail[:, None, :]
    d *= avail[None, :, :]
    return d
