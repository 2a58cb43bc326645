"""The marginal utility of money and consumer surplus.

Consumer surplus (Train 2009, eq. 3.10, from memory): E(CS_n) = logsum_n / alpha_n, with
alpha_n = -dV/d(cost) the marginal utility of income, up to an unknown constant that
cancels in changes: Delta E(CS_n) = (logsum_n^1 - logsum_n^0) / alpha_n (eq. 3.11, from
memory).  This needs cost to enter every alternative's utility linearly through the same
(generic) coefficient(s); context interactions are fine (alpha then varies by situation).

Train (2009) section and equation numbers are cited from memory.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from service.choice.batch import Batch
from service.choice.compiled import CompiledModel
from service.choice.errors import ScoringError
from service.choice.spec import Problem

MAX_LISTED = 10


@dataclass(frozen=True)
class CostEffect:
    """dV/d(cost) = sum over ``pairs`` of beta[coefficient] * z[context] (z = 1 if None)."""

    pairs: tuple[tuple[str, str | None], ...]


def cost_effect(model: CompiledModel, path: str = "options.surplus") -> CostEffect:
    """The single generic linear cost effect, or :class:`ScoringError` saying why not."""
    cost = model.cost_attribute
    if cost is None:
        raise ScoringError([Problem(path, "the model has no attribute with role 'cost'")])
    problems: list[Problem] = []
    effects: dict[str, frozenset[tuple[str, str | None]]] = {}
    for alt, terms in model.spec.utilities.items():
        pairs = []
        for i, t in enumerate(terms):
            if t.attribute != cost:
                continue
            if t.transform != "identity":
                problems.append(
                    Problem(
                        f"utilities.{alt}[{i}].transform",
                        f"cost enters through {t.transform}; surplus needs it linear",
                    )
                )
            pairs.append((t.coefficient, t.context))
        if pairs:
            effects[alt] = frozenset(pairs)
    if not effects:
        problems.append(Problem(path, f"no utility term uses the cost attribute {cost!r}"))
    distinct = set(effects.values())
    if len(distinct) > 1:
        first = next(iter(effects))
        for alt, eff in effects.items():
            if eff != effects[first]:
                problems.append(
                    Problem(
                        f"utilities.{alt}",
                        f"its cost coefficients differ from those of {first!r}; "
                        "surplus needs one generic cost effect",
                    )
                )
    if problems:
        raise ScoringError(problems)
    pairs = tuple(sorted(next(iter(effects.values())), key=lambda p: (p[0], p[1] or "")))
    if all(c is None for _, c in pairs):
        slope = sum(float(model.beta[model.coefficients.index(k)]) for k, _ in pairs)
        if not slope < 0:
            names = ", ".join(k for k, _ in pairs)
            raise ScoringError(
                [
                    Problem(
                        f"coefficients.{pairs[0][0]}",
                        f"the cost coefficient ({names}) is {slope:g}; surplus needs it negative",
                    )
                ]
            )
    return CostEffect(pairs=pairs)


def marginal_utility_of_money(
    model: CompiledModel, batch: Batch, path: str = "options.surplus"
) -> np.ndarray:
    """alpha_n = -dV/d(cost) (N,); :class:`ScoringError` unless positive everywhere."""
    effect = cost_effect(model, path)
    alpha = np.zeros(batch.size)
    for coef, ctx in effect.pairs:
        b = float(model.beta[model.coefficients.index(coef)])
        alpha -= b if ctx is None else b * batch.context[:, model.context.index(ctx)]
    bad = np.flatnonzero(~(alpha > 0))
    if bad.size:
        raise ScoringError(
            [
                Problem(
                    f"situations[{int(n)}].context",
                    f"the marginal utility of money -dV/d{model.cost_attribute} is "
                    f"{alpha[n]:g} here; surplus needs it positive",
                )
                for n in bad[:MAX_LISTED]
            ]
        )
    return alpha
