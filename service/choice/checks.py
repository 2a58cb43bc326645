"""Vectorised boundary checks of a batch against a compiled model (no per-situation loop)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from service.choice.batch import Batch, BatchProblem
from service.choice.compiled import CompiledModel

MAX_REPORTED = 100
"""At most this many problems (and as many warnings) are listed; the counts say the rest."""


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
    """Accumulates masked findings, listing at most ``cap`` of them."""

    def __init__(self, cap: int):
        self.cap = cap
        self.count = 0
        self.items: list[BatchProblem] = []

    def add(
        self,
        mask: np.ndarray,
        field: tuple[str, ...],
        message: str,
        values: np.ndarray | None = None,
    ) -> None:
        """``mask`` (N,) marks the bad situations; ``message`` may hold ``{v}``, filled
        with each bad situation's entry of ``values``."""
        hits = int(np.count_nonzero(mask))
        if not hits:
            return
        self.count += hits
        rows = np.flatnonzero(mask)[: self.cap]
        if values is None:
            texts = [message] * len(rows)
        else:
            texts = [message.format(v=float(v)) for v in values[rows]]
        self.items.extend(BatchProblem(int(r), field, t) for r, t in zip(rows, texts, strict=True))

    def add_whole(self, field: tuple[str, ...], message: str) -> None:
        """A finding about the batch as a whole (situation -1)."""
        self.count += 1
        self.items.append(BatchProblem(-1, field, message))

    def result(self) -> tuple[BatchProblem, ...]:
        self.items.sort(key=lambda p: p.situation)
        return tuple(self.items[: self.cap])


def check_batch(model: CompiledModel, batch: Batch, max_reported: int = MAX_REPORTED) -> BatchCheck:
    """Check what scoring needs, naming the field of every finding.

    Refused (problems): wrong shapes; a used cell of an available alternative or a used
    context value that is not finite; x <= 0 under log, x <= -1 under log1p; no
    alternative available; a weight that is not finite or is negative; weights summing to
    0.  Outside the range seen in estimation (the spec's low/high): a warning under
    ``warn``, a problem under ``reject``, clipped to the range (plus a warning) under
    ``clip``.
    """
    problems, warnings = _Collector(max_reported), _Collector(max_reported)
    shape_problems = _shape_problems(model, batch)
    if shape_problems:
        return BatchCheck(shape_problems, (), batch, len(shape_problems), 0)
    x, z, avail, w = batch.attributes, batch.context, batch.available, batch.weights
    n = batch.size
    if n == 0:
        bp = BatchProblem(-1, ("situations",), "the batch has no situations")
        return BatchCheck((bp,), (), batch, 1, 0)

    js, as_ = np.nonzero(model.required)
    # One pass over the whole array: its sum is finite only if every cell is (an
    # overflowing sum of finite values merely sends us to the per-cell check).
    with np.errstate(over="ignore", invalid="ignore"):
        all_finite = bool(np.isfinite(x.sum()))
    for j, a in zip(js, as_, strict=True):
        field = ("attributes", model.alternatives[j], model.attributes[a])
        col, live = x[:, j, a], avail[:, j]
        if not all_finite:
            bad = live & ~np.isfinite(col)
            problems.add(bad, field, "must be given as a finite number (got {v})", col)
        if model.log_cells[j, a]:
            problems.add(live & (col <= 0), field, "must be > 0 under log (got {v:g})", col)
        if model.log1p_cells[j, a]:
            bad = live & (col <= -1)
            problems.add(bad, field, "must be > -1 under log1p (got {v:g})", col)
    used_c = np.flatnonzero(model.required_context_mask)
    for c in used_c:
        col = z[:, c]
        problems.add(
            ~np.isfinite(col),
            ("context", model.context[c]),
            "must be given as a finite number (got {v})",
            col,
        )
    problems.add(~avail.any(axis=1), ("available",), "no alternative is available")
    w_finite = np.isfinite(w)
    problems.add(~w_finite, ("weight",), "must be finite (got {v})", w)
    problems.add(w_finite & (w < 0), ("weight",), "must be >= 0 (got {v:g})", w)
    if w_finite.all() and (w >= 0).all() and not w.sum() > 0:
        problems.add_whole(("weight",), "weights must have a positive sum")

    scored = _apply_ranges(model, batch, js, as_, used_c, problems, warnings)
    return BatchCheck(
        problems=problems.result(),
        warnings=warnings.result(),
        batch=scored,
        problem_count=problems.count,
        warning_count=warnings.count,
    )


def _shape_problems(model: CompiledModel, batch: Batch) -> tuple[BatchProblem, ...]:
    n_j, n_a, n_c = len(model.alternatives), len(model.attributes), len(model.context)
    n = np.shape(batch.attributes)[0] if np.ndim(batch.attributes) else -1
    expect = {
        "attributes": ((n, n_j, n_a), np.float64),
        "context": ((n, n_c), np.float64),
        "available": ((n, n_j), np.bool_),
        "weights": ((n,), np.float64),
    }
    out = []
    for name, (shape, dtype) in expect.items():
        arr = getattr(batch, name)
        if not isinstance(arr, np.ndarray) or arr.shape != shape or arr.dtype != dtype:
            got = f"{getattr(arr, 'shape', '?')} {getattr(arr, 'dtype', type(arr).__name__)}"
            want = f"{shape} {np.dtype(dtype)}"
            out.append(BatchProblem(-1, (name,), f"must be an array {want}, got {got}"))
    return tuple(out)


def _apply_ranges(
    model: CompiledModel,
    batch: Batch,
    js: np.ndarray,
    as_: np.ndarray,
    used_c: np.ndarray,
    problems: _Collector,
    warnings: _Collector,
) -> Batch:
    """The spec's range policy on used cells: scoring far outside the data a model was
    estimated on is extrapolation (common practice to flag it)."""
    policy = model.spec.range_policy
    sink = problems if policy == "reject" else warnings
    x_clips: list[tuple[int, int, float, float]] = []
    z_clips: list[tuple[int, float, float]] = []

    def report(col: np.ndarray, live: np.ndarray, low: float, high: float, field: tuple) -> bool:
        with np.errstate(invalid="ignore"):
            out = live & ((col < low) | (col > high))
        if not out.any():
            return False
        verb = {"warn": "outside", "reject": "outside", "clip": "clipped to"}[policy]
        sink.add(out, field, f"{{v:g}} is {verb} the estimation range [{low:g}, {high:g}]", col)
        return True

    for j, a in zip(js, as_, strict=True):
        var = model.spec.attributes[a]
        if var.low is None and var.high is None:
            continue
        low = -np.inf if var.low is None else var.low
        high = np.inf if var.high is None else var.high
        field = ("attributes", model.alternatives[j], var.name)
        if report(batch.attributes[:, j, a], batch.available[:, j], low, high, field):
            x_clips.append((j, a, low, high))
    for c in used_c:
        var = model.spec.context[c]
        if var.low is None and var.high is None:
            continue
        low = -np.inf if var.low is None else var.low
        high = np.inf if var.high is None else var.high
        live = np.ones(batch.size, dtype=bool)
        if report(batch.context[:, c], live, low, high, ("context", var.name)):
            z_clips.append((c, low, high))
    if policy != "clip" or not (x_clips or z_clips):
        return batch
    x = batch.attributes.copy() if x_clips else batch.attributes
    z = batch.context.copy() if z_clips else batch.context
    for j, a, low, high in x_clips:
        np.clip(x[:, j, a], low, high, out=x[:, j, a])
    for c, low, high in z_clips:
        np.clip(z[:, c], low, high, out=z[:, c])
    return Batch(attributes=x, context=z, available=batch.available, weights=batch.weights)
