"""What-if scenarios: the same situations under changed attributes and availability.

For each variant: weighted shares and their change from the base; the change in consumer
surplus per situation, Delta CS_n = (logsum_n^1 - logsum_n^0) / alpha_n (compensating
variation, Train 2009, eq. 3.11, from memory), and its weighted total and mean; expected
revenue sum_j P_nj cost_nj per situation and weighted in total, where a cost attribute exists.

Train (2009) section and equation numbers are cited from memory.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from service.choice.aggregate import shares, weighted_mean
from service.choice.batch import Batch, BatchProblem
from service.choice.checks import BatchCheck, check_batch
from service.choice.compiled import CompiledModel
from service.choice.errors import ScoringError
from service.choice.probabilities import UtilityNotFinite, choice_probabilities
from service.choice.spec import Problem
from service.choice.utility import utilities
from service.choice.welfare import marginal_utility_of_money

OPS = ("set", "add", "multiply")
MAX_LISTED = 10


@dataclass(frozen=True)
class Change:
    """Override one attribute of one alternative in every situation."""

    alternative: str
    attribute: str
    op: str
    """``set`` (x = value), ``add`` (x + value) or ``multiply`` (x * value)."""
    value: float


@dataclass(frozen=True)
class Variant:
    name: str
    changes: tuple[Change, ...] = ()
    remove: tuple[str, ...] = ()
    """Alternatives made unavailable in every situation."""
    add: tuple[str, ...] = ()
    """Alternatives made available in every situation (their values must be in the base)."""


@dataclass(frozen=True, eq=False)
class Outcome:
    name: str
    shares: np.ndarray
    """(J,) weighted shares."""
    logsum: np.ndarray
    """(N,)"""
    revenue: np.ndarray | None
    """(N,) expected revenue sum_j P_j cost_j (None without a cost attribute)."""
    revenue_total: float | None
    """sum_n w_n revenue_n."""
    warnings: tuple[BatchProblem, ...] = ()
    """Range-policy warnings of this batch (capped); of a variant, only those its changes
    bring (a base value out of range is warned once, in the base)."""


@dataclass(frozen=True, eq=False)
class VariantOutcome(Outcome):
    located_warnings: tuple[Problem, ...] = ()
    """``warnings`` located at the change, addition or removal behind each."""
    share_deltas: np.ndarray | None = None
    """(J,) shares minus base shares."""
    surplus_change: np.ndarray | None = None
    """(N,) Delta CS_n in money units (None when surplus is not defined for the model)."""
    surplus_change_total: float | None = None
    """sum_n w_n Delta CS_n."""
    surplus_change_mean: float | None = None
    """sum_n w_n Delta CS_n / sum_n w_n."""
    revenue_change_total: float | None = None


@dataclass(frozen=True, eq=False)
class ScenarioResult:
    base: Outcome
    variants: tuple[VariantOutcome, ...]
    surplus_unavailable: str | None = None
    """Why surplus changes are absent (no cost attribute, non-negative cost coefficient ...)."""


def run_scenarios(
    model: CompiledModel, base: Batch | BatchCheck, variants: Sequence[Variant]
) -> ScenarioResult:
    """Score the base and every variant; raises :class:`ScoringError` naming the variant
    field at fault (unknown names, missing values of an added alternative, a situation
    left with no alternative, an override outside a log domain, ...).

    ``base`` is a batch, checked here, or the :class:`BatchCheck` of a batch the caller has
    checked already (trusted as it is, not checked again).  A base situation whose utility
    overflows raises :class:`UtilityNotFinite` (its situations index the base batch).
    """
    _check_variants(model, variants)
    base_check = base if isinstance(base, BatchCheck) else check_batch(model, base)
    if base_check.problems:
        raise ScoringError([_problem_path("base", p) for p in base_check.problems])
    base = base_check.batch
    batches = [_variant_batch(model, base, v, i) for i, v in enumerate(variants)]

    alpha, why = None, None
    if model.cost_attribute is not None:
        try:
            alpha = marginal_utility_of_money(model, base, path="surplus")
        except ScoringError as e:
            why = e.problems[0].message
    else:
        why = "the model has no attribute with role 'cost'"

    w = base.weights
    base_out = _outcome(model, "base", base, base_check.warnings, None)
    outcomes = []
    in_base = {(p.situation, p.field) for p in base_check.warnings}
    for i, (v, (batch, all_warns)) in enumerate(zip(variants, batches, strict=True)):
        warns = tuple(p for p in all_warns if (p.situation, p.field) not in in_base)
        out = _outcome(model, v.name, batch, warns, f"variants[{i}]")
        dcs = total = mean = None
        if alpha is not None:
            dcs = (out.logsum - base_out.logsum) / alpha
            with np.errstate(over="ignore"):  # inf beyond the largest float, as revenue_total
                total = float(dcs @ w)
            mean = weighted_mean(dcs, w)
        d_rev = None
        if out.revenue_total is not None and base_out.revenue_total is not None:
            d_rev = out.revenue_total - base_out.revenue_total
        outcomes.append(
            VariantOutcome(
                name=out.name,
                shares=out.shares,
                logsum=out.logsum,
                revenue=out.revenue,
                revenue_total=out.revenue_total,
                warnings=out.warnings,
                located_warnings=tuple(_variant_problem(v, i, p) for p in warns),
                share_deltas=out.shares - base_out.shares,
                surplus_change=dcs,
                surplus_change_total=total,
                surplus_change_mean=mean,
                revenue_change_total=d_rev,
            )
        )
    return ScenarioResult(base=base_out, variants=tuple(outcomes), surplus_unavailable=why)


def _outcome(
    model: CompiledModel,
    name: str,
    batch: Batch,
    warnings: tuple[BatchProblem, ...],
    path: str | None,
) -> Outcome:
    """Shares, logsums and revenue of one batch; ``path`` names a variant (None: the base,
    whose overflowing situations are left for the caller to locate)."""
    available = batch.available.T
    try:
        state = choice_probabilities(model, utilities(model, batch), available)
    except UtilityNotFinite as e:
        if path is None:
            raise
        raise ScoringError(
            [Problem(path, f"situation {p.situation}: {p.message}") for p in e.situations]
        ) from e
    p = state.probabilities
    revenue = revenue_total = None
    if model.cost_attribute is not None:
        a = model.attribute_index(model.cost_attribute)
        priced = available & model.required[:, a][:, None]
        cost = np.where(priced, batch.attributes[:, :, a].T, 0.0)
        revenue = (p * cost).sum(axis=0)
        with np.errstate(over="ignore"):  # a total beyond the largest float is inf, refused
            revenue_total = float(revenue @ batch.weights)  # by the caller as not finite
    return Outcome(
        name=name,
        shares=shares(p, batch.weights),
        logsum=state.logsum,
        revenue=revenue,
        revenue_total=revenue_total,
        warnings=warnings,
    )


def _check_variants(model: CompiledModel, variants: Sequence[Variant]) -> None:
    problems: list[Problem] = []
    names: set[str] = set()
    for i, v in enumerate(variants):
        p = f"variants[{i}]"
        if v.name in names:
            problems.append(Problem(f"{p}.name", f"duplicate variant name {v.name!r}"))
        names.add(v.name)
        for c, ch in enumerate(v.changes):
            cp = f"{p}.changes[{c}]"
            if ch.alternative not in model.alternatives:
                problems.append(Problem(f"{cp}.alternative", f"{ch.alternative!r} is unknown"))
            if ch.attribute not in model.attributes:
                problems.append(Problem(f"{cp}.attribute", f"{ch.attribute!r} is unknown"))
            elif (
                ch.alternative in model.alternatives
                and not model.required[
                    model.alternative_index(ch.alternative), model.attribute_index(ch.attribute)
                ]
            ):
                # A change that cannot move any probability is a mistake in the request.
                problems.append(
                    Problem(
                        f"{cp}.attribute",
                        f"{ch.attribute!r} does not enter the utility of {ch.alternative!r}",
                    )
                )
            if ch.op not in OPS:
                problems.append(Problem(f"{cp}.op", f"must be one of {', '.join(OPS)}"))
            if isinstance(ch.value, bool) or not (
                isinstance(ch.value, int | float) and math.isfinite(ch.value)
            ):
                problems.append(Problem(f"{cp}.value", "must be a finite number"))
        for key in ("remove", "add"):
            for r, alt in enumerate(getattr(v, key)):
                if alt not in model.alternatives:
                    problems.append(Problem(f"{p}.{key}[{r}]", f"{alt!r} is unknown"))
        for alt in set(v.remove) & set(v.add):
            problems.append(Problem(f"{p}.add", f"{alt!r} is both removed and added"))
    if problems:
        raise ScoringError(problems)


def _variant_batch(
    model: CompiledModel, base: Batch, v: Variant, i: int
) -> tuple[Batch, tuple[BatchProblem, ...]]:
    x = base.attributes.copy() if v.changes else base.attributes
    avail = base.available.copy()
    for alt in v.remove:
        avail[:, model.alternative_index(alt)] = False
    for alt in v.add:
        avail[:, model.alternative_index(alt)] = True
    for ch in v.changes:
        j, a = model.alternative_index(ch.alternative), model.attribute_index(ch.attribute)
        col = x[:, j, a]
        if ch.op == "set":
            col[:] = ch.value
        elif ch.op == "add":
            col += ch.value
        else:
            col *= ch.value

    problems: list[Problem] = []
    for r, alt in enumerate(v.add):
        j = model.alternative_index(alt)
        newly = ~base.available[:, j]
        for a in np.flatnonzero(model.required[j]):
            missing = np.flatnonzero(newly & ~np.isfinite(x[:, j, a]))
            if missing.size:
                listed = ", ".join(str(int(n)) for n in missing[:MAX_LISTED])
                problems.append(
                    Problem(
                        f"variants[{i}].add[{r}]",
                        f"attributes.{alt}.{model.attributes[a]} is missing from the base "
                        f"in situations {listed}"
                        + (
                            f" and {missing.size - MAX_LISTED} more"
                            if missing.size > MAX_LISTED
                            else ""
                        ),
                    )
                )
    if problems:
        raise ScoringError(problems)
    batch = Batch(attributes=x, context=base.context, available=avail, weights=base.weights)
    check = check_batch(model, batch)
    if check.problems:
        raise ScoringError([_variant_problem(v, i, p) for p in check.problems])
    return check.batch, check.warnings


def _variant_problem(v: Variant, i: int, p: BatchProblem) -> Problem:
    """Locate a variant's batch problem at the change, addition or removal behind it."""
    where = f"variants[{i}]"
    if p.field[:1] == ("attributes",) and len(p.field) == 3:
        alt, attr = p.field[1], p.field[2]
        touching = [
            c for c, ch in enumerate(v.changes) if (ch.alternative, ch.attribute) == (alt, attr)
        ]
        if touching:
            where = f"{where}.changes[{touching[-1]}]"
        elif alt in v.add:
            where = f"{where}.add[{v.add.index(alt)}]"
    elif p.field == ("available",) and v.remove:
        where = f"{where}.remove"
    return Problem(where, f"situation {p.situation}: {'.'.join(p.field)} {p.message}")


def _problem_path(prefix: str, p: BatchProblem) -> Problem:
    situation = f".situations[{p.situation}]" if p.situation >= 0 else ""
    field = "".join(f".{f}" for f in p.field)
    return Problem(f"{prefix}{situation}{field}", p.message)
