"""Vectorised boundary checks of a batch against a compiled model (no per-situation loop)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from service.choice.batch import Batch, BatchProblem
from service.choice.compiled import LARGEST_FLOAT, CompiledModel, ValueChecks

MAX_REPORTED = 100
"""At most this many problems (and as many warnings) are listed; the counts say the rest."""
CHUNK_VALUES = 2**16
"""Used values are gathered and checked in blocks of about this many, bounding memory."""


@dataclass(frozen=True, eq=False)
class BatchCheck:
    """Outcome of :func:`check_batch`: problems refuse the batch, warnings do not."""

    problems: tuple[BatchProblem, ...]
    warnings: tuple[BatchProblem, ...]
    batch: Batch
    """The batch to score: the clipped copy under the ``clip`` policy, else the input."""
    problem_count: int = 0
    """All problems found (``len(problems)`` is capped at :data:`MAX_REPORTED`)."""
    warning_count: int = 0

    @property
    def ok(self) -> bool:
        return not self.problems

    @property
    def omitted_problems(self) -> int:
        return self.problem_count - len(self.problems)

    @property
    def omitted_warnings(self) -> int:
        return self.warning_count - len(self.warnings)


class _Collector:
    """Counts findings and keeps the first ``cap`` of them by situation."""

    def __init__(self, cap: int):
        self.cap = cap
        self.count = 0
        self.items: list[BatchProblem] = []
        self.full = False

    def add(
        self,
        mask: np.ndarray,
        fields: tuple[str, ...] | tuple[tuple[str, ...], ...],
        message: str | tuple[str, ...],
        values: np.ndarray | None = None,
        offset: int = 0,
    ) -> None:
        """``mask`` (n,) or (n, R) marks bad situations (rows, from ``offset``) and values
        (columns, with one field and message each); a message may hold ``{v}``, filled
        with the entry of ``values``."""
        hits = int(np.count_nonzero(mask))
        if not hits:
            return
        self.count += hits
        if self.full:
            return
        if mask.ndim == 1:
            rows = np.flatnonzero(mask)[: self.cap]
            cols = np.zeros(len(rows), dtype=np.intp)
            fields, message = (fields,), (message,)  # type: ignore[assignment]
            vals = None if values is None else values[rows]
        else:
            rows, cols = (i[: self.cap] for i in np.nonzero(mask))
            vals = None if values is None else values[rows, cols]
        for k, (r, c) in enumerate(zip(rows, cols, strict=True)):
            text = message[c] if isinstance(message, tuple) else message
            if vals is not None:
                text = text.format(v=float(vals[k]))
            self.items.append(BatchProblem(int(r) + offset, fields[c], text))  # type: ignore[arg-type]

    def add_whole(self, field: tuple[str, ...], message: str) -> None:
        """A finding about the batch as a whole (situation -1)."""
        self.count += 1
        self.items.append(BatchProblem(-1, field, message))

    def settle(self, before: int) -> None:
        """Keep the first ``cap`` items; stop listing once they all lie before ``before``
        (the rows still to come cannot displace them)."""
        self.items = sorted(self.items, key=lambda p: p.situation)[: self.cap]
        self.full = len(self.items) == self.cap and self.items[-1].situation < before

    def result(self) -> tuple[BatchProblem, ...]:
        self.settle(0)
        return tuple(self.items)


def check_batch(model: CompiledModel, batch: Batch, max_reported: int = MAX_REPORTED) -> BatchCheck:
    """Check what scoring needs, naming the field of every finding.

    Refused (problems): wrong shapes; a used cell of an available alternative or a used
    context value that is not finite; x <= 0 under log, x <= -1 under log1p; no
    alternative available; a weight that is not finite or is negative; weights summing to
    0.  Outside the range seen in estimation (the spec's low/high; scoring far outside the
    estimation data is extrapolation, common practice to flag it): a warning under
    ``warn``, a problem under ``reject``, clipped to the range (plus a warning) under
    ``clip``.
    """
    shape_problems = _shape_problems(model, batch)
    if shape_problems:
        return BatchCheck(shape_problems, (), batch, len(shape_problems), 0)
    n = batch.size
    if n == 0:
        bp = BatchProblem(-1, ("situations",), "the batch has no situations")
        return BatchCheck((bp,), (), batch, 1, 0)
    # A batch small enough to judge at once is accepted in a few comparisons when nothing
    # is to be reported; otherwise the checks below find and name each finding.
    judged = n * (len(model.attribute_checks) + len(model.context_checks))
    if judged <= CHUNK_VALUES and _nothing_to_report(model, batch):
        return BatchCheck((), (), batch, 0, 0)
    problems, warnings = _Collector(max_reported), _Collector(max_reported)
    avail, w = batch.available, batch.weights
    problems.add(~avail.any(axis=1), ("available",), "no alternative is available")
    w_finite = np.isfinite(w)
    if w_finite.all():
        negative = w < 0
        problems.add(negative, ("weight",), "must be >= 0 (got {v:g})", w)
        with np.errstate(over="ignore"):  # a sum that overflows is inf, still positive
            total = w.sum()
        if not negative.any() and not total > 0:
            problems.add_whole(("weight",), "weights must have a positive sum")
    else:
        problems.add(~w_finite, ("weight",), "must be finite (got {v})", w)
        problems.add(w_finite & (w < 0), ("weight",), "must be >= 0 (got {v:g})", w)

    policy = model.spec.range_policy
    sink = problems if policy == "reject" else warnings
    clips: list[tuple[ValueChecks, np.ndarray, bool]] = []
    # NaN and inf are findings here, not accidents: one errstate for the sums and comparisons.
    with np.errstate(over="ignore", invalid="ignore"):
        for all_checks, arr, cells in (
            (model.attribute_checks, batch.attributes, True),
            (model.context_checks, batch.context, False),
        ):
            # One pass decides whether finiteness needs checking value by value: a sum is
            # finite only if every term is (an overflowing sum just takes the long way).
            all_finite = bool(np.isfinite(arr.sum()))
            checks = all_checks.bounded_checks if all_finite else all_checks
            if not len(checks):
                continue
            clip = np.zeros(len(checks), dtype=bool)
            step = max(1, CHUNK_VALUES // len(checks))
            for start in range(0, n, step):
                stop = min(n, start + step)
                problems.settle(start)
                sink.settle(start)
                if cells:
                    values = arr[start:stop][:, checks.alternative, checks.index]
                    live = avail[start:stop][:, checks.alternative]
                else:
                    values = arr[start:stop][:, checks.index]
                    live = np.ones_like(values, dtype=bool)
                if all_finite:
                    judged = live
                else:
                    finite = np.isfinite(values)
                    message = "must be given as a finite number (got {v})"
                    problems.add(live & ~finite, checks.fields, message, values, start)
                    judged = live & finite
                outside_domain = judged & (values <= checks.domain)
                outside_range = judged & ((values < checks.low) | (values > checks.high))
                problems.add(outside_domain, checks.fields, checks.domain_messages, values, start)
                sink.add(outside_range, checks.fields, checks.range_messages, values, start)
                clip |= outside_range.any(axis=0)
            clips.append((checks, clip, cells))

    scored = batch
    if policy == "clip" and any(clip.any() for _, clip, _ in clips):
        scored = _clipped(batch, clips)
    return BatchCheck(
        problems=problems.result(),
        warnings=warnings.result(),
        batch=scored,
        problem_count=problems.count,
        warning_count=warnings.count,
    )


def _nothing_to_report(model: CompiledModel, batch: Batch) -> bool:
    """Whether a batch passes every check of :func:`check_batch`, judged in a few whole-batch
    comparisons: weights finite and >= 0 with one > 0 (then their sum is positive); every
    used value (the used cells, then the used context variables, side by side) inside its
    :attr:`ValueChecks.accepted` bounds wherever it is judged: a cell where its alternative
    is available, a context value always; an alternative available in every situation.
    False means there is something to report, and the full check finds and names it."""
    avail, w = batch.available, batch.weights
    lightest, heaviest = w.min(), w.max()  # NaN if any weight is NaN (then both tests fail)
    if not (lightest >= 0 and 0 < heaviest <= LARGEST_FLOAT):
        return False
    cells = model.attribute_checks
    values = batch.attributes[:, cells.alternative, cells.index]
    if len(model.context_checks):
        values = np.concatenate((values, batch.context[:, model.context_checks.index]), axis=1)
    lo, hi = model.accepted_values
    inside = values >= lo
    inside &= values <= hi
    if avail.all():
        return bool(inside.all())
    if not avail.any(axis=1).all():
        return False
    always = np.ones((batch.size, 1), dtype=bool)
    judged = np.concatenate((avail, always), axis=1)[:, model.judged_by]
    return bool((inside >= judged).all())


def _clipped(batch: Batch, clips: list[tuple[ValueChecks, np.ndarray, bool]]) -> Batch:
    """A copy with the flagged values clipped to their estimation range."""
    x, z = batch.attributes, batch.context
    for checks, clip, cells in clips:
        if not clip.any():
            continue
        if cells:
            x = x.copy()
        else:
            z = z.copy()
        for r in np.flatnonzero(clip):
            col = x[:, checks.alternative[r], checks.index[r]] if cells else z[:, checks.index[r]]
            np.clip(col, checks.low[r], checks.high[r], out=col)
    return Batch(attributes=x, context=z, available=batch.available, weights=batch.weights)


_FLOAT, _BOOL = np.dtype(np.float64), np.dtype(np.bool_)


def _shape_problems(model: CompiledModel, batch: Batch) -> tuple[BatchProblem, ...]:
    n_j, n_a, n_c = len(model.alternatives), len(model.attributes), len(model.context)
    x = batch.attributes
    if isinstance(x, np.ndarray):
        n = x.shape[0] if x.ndim else -1
    else:  # a list or a scalar: its shape as NumPy would read it
        n = np.shape(x)[0] if np.ndim(x) else -1
    expect = (
        ("attributes", (n, n_j, n_a), _FLOAT),
        ("context", (n, n_c), _FLOAT),
        ("available", (n, n_j), _BOOL),
        ("weights", (n,), _FLOAT),
    )
    out = []
    for name, shape, dtype in expect:
        arr = getattr(batch, name)
        if not isinstance(arr, np.ndarray) or arr.shape != shape or arr.dtype != dtype:
            got = f"{getattr(arr, 'shape', '?')} {getattr(arr, 'dtype', type(arr).__name__)}"
            out.append(BatchProblem(-1, (name,), f"must be an array {shape} {dtype}, got {got}"))
    return tuple(out)
