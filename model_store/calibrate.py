"""Calibrating alternative-specific constants to target aggregate shares.

The update (Train 2009, sec. 2.8, from memory): ASC_j <- ASC_j + ln(S_j / S^_j), where S_j is
the target share and S^_j the share predicted on the population by sample enumeration. The
reference alternative r keeps its constant, so every other constant moves by
ln(S_j / S^_j) - ln(S_r / S^_r): the same update followed by the usual normalisation
(adding one number to every utility changes no logit or nested logit probability). At the
fixed point predicted equals target shares. The step is halved whenever
it would increase the largest gap (a safeguard for nested models, whose shares respond to a
constant by up to 1/lambda times more than a multinomial logit's).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from model_store.population import score_population
from model_store.store import LoadedVersion
from service.choice import Coefficients, ModelSpec, ScoreOptions
from service.choice.spec import Problem, SpecError


@dataclass(frozen=True)
class Calibration:
    coefficients: Coefficients
    reference: str
    constants: Mapping[str, str]
    """Alternative -> the constant adjusted for it."""
    adjustments: Mapping[str, float]
    """Constant -> calibrated minus original value."""
    iterations: int
    gap: float
    """max_j |S_j - S^_j| at the end."""
    shares: Mapping[str, float]
    targets: Mapping[str, float]
    converged: bool


def check_targets(spec: ModelSpec, targets: Mapping[str, float]) -> dict[str, float]:
    """Targets name every alternative once, each in (0, 1), summing to 1 (within 1e-6)."""
    problems = []
    alts = spec.alternative_ids
    for name in targets:
        if name not in alts:
            problems.append(Problem(f"targets.{name}", "not an alternative of the model"))
    for alt in alts:
        if alt not in targets:
            problems.append(
                Problem(f"targets.{alt}", "missing: give a share for every alternative")
            )
    out = {}
    for alt in alts:
        if alt in targets:
            value = targets[alt]
            if not isinstance(value, int | float) or not math.isfinite(value) or not 0 < value < 1:
                problems.append(
                    Problem(f"targets.{alt}", f"must be a share in (0, 1), not {value}")
                )
            else:
                out[alt] = float(value)
    if not problems and abs(sum(out.values()) - 1.0) > 1e-6:
        problems.append(Problem("targets", f"must sum to 1, not {sum(out.values()):.6g}"))
    if problems:
        raise SpecError(problems)
    return out


def calibration_constants(spec: ModelSpec, reference: str | None) -> tuple[str, dict[str, str]]:
    """The reference alternative and, for every other alternative, its own constant: a term
    with neither attribute nor context whose coefficient no other alternative uses."""
    users: dict[str, set[str]] = {}
    for alt, terms in spec.utilities.items():
        for term in terms:
            users.setdefault(term.coefficient, set()).add(alt)
    own: dict[str, str] = {}
    for alt, terms in spec.utilities.items():
        for term in terms:
            if term.attribute is None and term.context is None and users[term.coefficient] == {alt}:
                own[alt] = term.coefficient
    alts = spec.alternative_ids
    if reference is None:
        outside = [a.id for a in spec.alternatives if a.outside]
        without = [a for a in alts if a not in own]
        if outside:
            reference = outside[0]
        elif len(without) == 1:
            reference = without[0]
        else:
            raise SpecError(
                [Problem("reference", "choose the alternative whose constant stays fixed")]
            )
    if reference not in alts:
        raise SpecError([Problem("reference", f"{reference!r} is not an alternative")])
    missing = [a for a in alts if a != reference and a not in own]
    if missing:
        raise SpecError(
            [
                Problem(
                    f"utilities.{a}",
                    "has no alternative-specific constant to calibrate (add one or make it the reference)",
                )
                for a in missing
            ]
        )
    return reference, {a: own[a] for a in alts if a != reference}


def calibrate(
    loaded: LoadedVersion,
    table: pa.Table,
    targets: Mapping[str, float],
    *,
    reference: str | None = None,
    tolerance: float = 1e-6,
    max_iterations: int = 500,
) -> Calibration:
    """Iterate the constant update until max |S - S^| <= ``tolerance`` (or the limit)."""
    spec = loaded.spec
    goal = check_targets(spec, targets)
    reference, constants = calibration_constants(spec, reference)
    alts = spec.alternative_ids
    target = np.array([goal[a] for a in alts])
    moving = np.array([a in constants for a in alts])
    index = [loaded.coefficients.index(constants[a]) if a in constants else -1 for a in alts]
    base = loaded.coefficients

    def with_constants(beta: np.ndarray) -> LoadedVersion:
        coefficients = Coefficients(base.names, beta, base.std_errors, base.covariance)
        return LoadedVersion(spec, coefficients, loaded.manifest)

    def shares_of(beta: np.ndarray) -> np.ndarray:
        scored = score_population(with_constants(beta), table, ScoreOptions(aggregate=True))
        assert scored.result.aggregate is not None
        return scored.result.aggregate.shares

    beta = base.estimates.copy()
    predicted = shares_of(beta)
    if np.any(predicted[moving] <= 0):
        bad = [a for a, m, s in zip(alts, moving, predicted, strict=True) if m and s <= 0]
        raise SpecError([Problem(f"targets.{a}", "never available in the population") for a in bad])
    gap = float(np.max(np.abs(target - predicted)))
    step, iterations = 1.0, 0
    while gap > tolerance and iterations < max_iterations:
        iterations += 1
        ratio = np.log(target / np.maximum(predicted, 1e-300))
        update = ratio - ratio[alts.index(reference)]
        trial = beta.copy()
        for j, k in enumerate(index):
            if k >= 0:
                trial[k] += step * update[j]
        trial_shares = shares_of(trial)
        trial_gap = float(np.max(np.abs(target - trial_shares)))
        if trial_gap > gap and step > 1e-3:
            step /= 2
            continue
        beta, predicted, gap = trial, trial_shares, trial_gap
    final = Coefficients(base.names, beta, base.std_errors, base.covariance)
    return Calibration(
        coefficients=final,
        reference=reference,
        constants=constants,
        adjustments={
            constants[a]: float(beta[k] - base.estimates[k])
            for a, k in zip(alts, index, strict=True)
            if k >= 0
        },
        iterations=iterations,
        gap=gap,
        shares=dict(zip(alts, predicted.tolist(), strict=True)),
        targets=goal,
        converged=gap <= tolerance,
    )
