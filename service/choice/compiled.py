"""A validated model compiled once into index and coefficient arrays.

Axes: J alternatives (``CompiledModel.alternatives``), A attributes (``.attributes``),
C context variables (``.context``), K coefficients (``.coefficients.names``), M nests.

Utility (Train 2009, sec. 2.5 and 3.1):  V_j = sum_t beta[k_t] * t(x[j_t, a_t]) * z[c_t].
Terms of the form beta * x (identity, no context) are folded into a dense block
``linear`` (J, A); terms with no attribute and no context into ``constants`` (J,); every
other term (a transform or a context interaction) into a :class:`TermBlock`, evaluated for
all alternatives at once.

Train (2009) section and equation numbers are cited from memory.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np

from service.choice.spec import Coefficients, ModelSpec, validate_model

IDENTITY, LOG, LOG1P = 0, 1, 2
TRANSFORM_CODES = {"identity": IDENTITY, "log": LOG, "log1p": LOG1P}
NONE = -1
"""Index meaning "no attribute" / "no context variable" / "no nest"."""
LARGEST_FLOAT = float(np.finfo(np.float64).max)


@dataclass(frozen=True)
class TermArrays:
    """Every utility term as parallel index arrays of length T."""

    alternative: np.ndarray
    attribute: np.ndarray
    """Attribute index, or NONE for a constant."""
    context: np.ndarray
    """Context index, or NONE."""
    transform: np.ndarray
    coefficient: np.ndarray

    def __len__(self) -> int:
        return len(self.alternative)

    @cached_property
    def rows(self) -> tuple[tuple[int, int, int, int, int], ...]:
        """Each term as plain ints (alternative, attribute, context, transform,
        coefficient), for loops over terms (built once)."""
        columns = (self.alternative, self.attribute, self.context, self.transform)
        return tuple(zip(*(c.tolist() for c in (*columns, self.coefficient)), strict=True))

    def select(self, mask: np.ndarray) -> TermArrays:
        return TermArrays(
            alternative=self.alternative[mask],
            attribute=self.attribute[mask],
            context=self.context[mask],
            transform=self.transform[mask],
            coefficient=self.coefficient[mask],
        )


@dataclass(frozen=True, eq=False)
class TermBlock:
    """The general terms (a transform or a context variable) laid out by alternative: slot
    (j, s) of the (J, S) grid holds the s-th such term of alternative j, S the most any
    alternative has; empty slots hold 0 and weigh 0.  Per batch the features
    F[n, j, s] = t(x[n, j, a]) * z[n, c] are gathered and transformed in a few whole-grid
    operations, and V_j += sum_s weights[j, s] * F[n, j, s] is one stacked matrix-vector
    product, so each alternative's utility sums only its own terms (an infinite or NaN
    feature of one alternative never reaches another).  Arrays are flattened (J * S,)."""

    slots: int
    """S, the slots per alternative (0: the model has no general term)."""
    cells: np.ndarray
    """Flat attribute cell j * A + a of each slot (0 where the term has no attribute)."""
    fill: np.ndarray
    """The slot's value where it has no attribute: 1 for a context-only term, 0 if empty."""
    unfilled: np.ndarray
    """Slots without an attribute (their feature starts from ``fill``)."""
    gathered: bool
    """Whether any slot reads an attribute cell (a model may have context-only terms, or no
    attribute at all)."""
    logged: np.ndarray | None
    """Slots under log (None if none is)."""
    logged1p: np.ndarray | None
    """Slots under log1p (None if none is)."""
    context: np.ndarray
    """Context index multiplying each slot (0 where none does)."""
    interacted: np.ndarray | None
    """Slots multiplied by a context variable (None if none is)."""
    weights: np.ndarray
    """(J, S, 1) coefficient of each slot, 0 if empty."""


def _term_block(terms: TermArrays, beta: np.ndarray, n_j: int, n_a: int) -> TermBlock:
    by_alternative = [np.flatnonzero(terms.alternative == j) for j in range(n_j)]
    n_s = max((len(t) for t in by_alternative), default=0)
    grid = {name: np.zeros((n_j, n_s), dtype=dtype) for name, dtype in (
        ("cells", np.intp), ("fill", np.float64), ("unfilled", bool), ("logged", bool),
        ("logged1p", bool), ("context", np.intp), ("interacted", bool), ("weights", np.float64),
    )}  # fmt: skip
    grid["unfilled"][:] = True
    for j, rows in enumerate(by_alternative):
        for s, t in enumerate(rows):
            a, c, code = terms.attribute[t], terms.context[t], terms.transform[t]
            grid["weights"][j, s] = beta[terms.coefficient[t]]
            if a == NONE:
                grid["fill"][j, s] = 1.0
            else:
                grid["cells"][j, s], grid["unfilled"][j, s] = j * n_a + a, False
                grid["logged"][j, s], grid["logged1p"][j, s] = code == LOG, code == LOG1P
            if c != NONE:
                grid["context"][j, s], grid["interacted"][j, s] = c, True
    for g in grid.values():
        g.setflags(write=False)
    flat = {name: g.reshape(-1) for name, g in grid.items()}

    def unless_empty(mask: np.ndarray) -> np.ndarray | None:
        return mask if mask.any() else None

    return TermBlock(
        slots=n_s,
        cells=flat["cells"],
        fill=flat["fill"],
        unfilled=flat["unfilled"],
        gathered=not flat["unfilled"].all(),
        logged=unless_empty(flat["logged"]),
        logged1p=unless_empty(flat["logged1p"]),
        context=flat["context"],
        interacted=unless_empty(flat["interacted"]),
        weights=grid["weights"][:, :, None],
    )


@dataclass(frozen=True, eq=False)
class ValueChecks:
    """The values a model uses, R of them, with what check_batch requires of each."""

    fields: tuple[tuple[str, ...], ...]
    """Field path of each value, e.g. ("attributes", "bus", "fare") or ("context", "income")."""
    alternative: np.ndarray
    """(R,) alternative index (NONE for a context variable)."""
    index: np.ndarray
    """(R,) attribute or context index."""
    domain: np.ndarray
    """(R,) the value must exceed this (0 under log, -1 under log1p, else -inf)."""
    domain_messages: tuple[str, ...]
    low: np.ndarray
    """(R,) estimation range, -inf / inf where open."""
    high: np.ndarray
    range_messages: tuple[str, ...]
    """Warning (or refusal) of a value outside its estimation range, ``{v}`` to fill."""

    def __len__(self) -> int:
        return len(self.index)

    @cached_property
    def accepted(self) -> tuple[np.ndarray, np.ndarray]:
        """(R,) closed bounds [lo, hi] inside which a value passes every check at once: above
        the domain bound (the next float up from it), inside the estimation range, and
        finite (lo >= -max float, hi <= max float; NaN fails every comparison)."""
        lo = np.maximum(np.maximum(self.low, np.nextafter(self.domain, np.inf)), -LARGEST_FLOAT)
        hi = np.minimum(self.high, LARGEST_FLOAT)
        return _read_only(lo), _read_only(hi)

    @property
    def bounded(self) -> np.ndarray:
        """(R,) bool: values with a domain or range bound (more than a finiteness check)."""
        return np.isfinite(self.domain) | np.isfinite(self.low) | np.isfinite(self.high)

    @cached_property
    def bounded_checks(self) -> ValueChecks:
        """The checks of the bounded values only (built once per compiled model)."""
        return self.select(np.flatnonzero(self.bounded))

    def select(self, which: np.ndarray) -> ValueChecks:
        """The checks of the values ``which`` (integer positions)."""
        return ValueChecks(
            fields=tuple(self.fields[i] for i in which),
            alternative=self.alternative[which],
            index=self.index[which],
            domain=self.domain[which],
            domain_messages=tuple(self.domain_messages[i] for i in which),
            low=self.low[which],
            high=self.high[which],
            range_messages=tuple(self.range_messages[i] for i in which),
        )


def _value_checks(
    fields: list[tuple[str, ...]],
    alternative: list[int],
    index: list[int],
    domain: list[float],
    bounds: list[tuple[float | None, float | None]],
    range_policy: str,
) -> ValueChecks:
    messages = {
        0.0: "must be > 0 under log (got {v:g})",
        -1.0: "must be > -1 under log1p (got {v:g})",
    }
    low = np.array([-np.inf if lo is None else lo for lo, _ in bounds], dtype=np.float64)
    high = np.array([np.inf if hi is None else hi for _, hi in bounds], dtype=np.float64)
    verb = "clipped to" if range_policy == "clip" else "outside"
    return ValueChecks(
        fields=tuple(fields),
        alternative=np.array(alternative, dtype=np.intp),
        index=np.array(index, dtype=np.intp),
        domain=np.array(domain, dtype=np.float64),
        domain_messages=tuple(messages.get(d, "") for d in domain),
        low=low,
        high=high,
        range_messages=tuple(
            f"{{v:g}} is {verb} the estimation range [{lo:g}, {hi:g}]"
            for lo, hi in zip(low, high, strict=True)
        ),
    )


@dataclass(frozen=True, eq=False)
class CompiledModel:
    """A model version ready to score batches (build it with :func:`compile_model`)."""

    spec: ModelSpec
    coefficients: Coefficients
    alternatives: tuple[str, ...]
    attributes: tuple[str, ...]
    context: tuple[str, ...]
    cost_attribute: str | None
    beta: np.ndarray
    """Coefficient estimates (K,), ordered as ``coefficients.names``."""
    terms: TermArrays
    """All utility terms (for derivatives and the design of V in beta)."""
    linear: np.ndarray
    """(J, A): summed beta of identity, context-free attribute terms."""
    constants: np.ndarray
    """(J,): summed alternative-specific constants."""
    general: TermBlock
    """Terms with a transform or a context variable, evaluated together over the batch."""
    required: np.ndarray
    """(J, A) bool: cells some term of the alternative uses."""
    required_context_mask: np.ndarray
    """(C,) bool: context variables some term uses."""
    log_cells: np.ndarray
    """(J, A) bool: cells under a log transform (need x > 0)."""
    log1p_cells: np.ndarray
    """(J, A) bool: cells under a log1p transform (need x > -1)."""
    attribute_checks: ValueChecks
    """The used (alternative, attribute) cells, for check_batch."""
    context_checks: ValueChecks
    """The used context variables, for check_batch."""
    nest_ids: tuple[str, ...] = ()
    nest_of: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.intp))
    """(J,) nest index of each alternative (empty for binary / multinomial)."""
    nest_scale_index: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.intp))
    """(M,) coefficient index of each nest's scale."""
    nest_scales: np.ndarray = field(default_factory=lambda: np.zeros(0))
    """(M,) scale (lambda) of each nest."""

    @property
    def nested(self) -> bool:
        return len(self.nest_ids) > 0

    @cached_property
    def positions(self) -> tuple[dict[str, int], dict[str, int], dict[str, int]]:
        """Axis position of each alternative, attribute and context name (built once)."""
        return tuple(
            {name: i for i, name in enumerate(names)}
            for names in (self.alternatives, self.attributes, self.context)
        )  # type: ignore[return-value]

    @cached_property
    def record_slots(self) -> tuple[dict[str, dict[str, int]], dict[str, int]]:
        """Where a record's values go, by name (built once): alternative -> attribute ->
        flat cell j * A + a of the attributes reshaped (N, J * A), and context variable ->
        index; -1 for a known name no term uses (its value is type-checked, then ignored)."""
        n_a = len(self.attributes)
        cells = {
            alt: {
                attr: j * n_a + a if self.required[j, a] else -1
                for a, attr in enumerate(self.attributes)
            }
            for j, alt in enumerate(self.alternatives)
        }
        context = {
            name: c if self.required_context_mask[c] else -1 for c, name in enumerate(self.context)
        }
        return cells, context

    @cached_property
    def unset_values(self) -> tuple[np.ndarray, np.ndarray]:
        """(J, A) and (C,) read-only fill of a situation before its values are set: NaN
        where the model uses the value (missing until given), 0 elsewhere."""
        x = np.where(self.required, np.nan, 0.0)
        z = np.where(self.required_context_mask, np.nan, 0.0)
        x.setflags(write=False)
        z.setflags(write=False)
        return x, z

    @cached_property
    def accepted_values(self) -> tuple[np.ndarray, np.ndarray]:
        """(R + R_c,) :attr:`ValueChecks.accepted` bounds of the checked cells, then of the
        checked context variables."""
        pairs = (self.attribute_checks.accepted, self.context_checks.accepted)
        lo, hi = (np.concatenate([p[i] for p in pairs]) for i in (0, 1))
        return _read_only(lo), _read_only(hi)

    @cached_property
    def judged_by(self) -> np.ndarray:
        """(R + R_c,) the alternative whose availability decides whether a checked value is
        judged, J (always judged) for a context variable; ordered as ``accepted_values``."""
        always = np.full(len(self.context_checks), len(self.alternatives), dtype=np.intp)
        return _read_only(np.concatenate((self.attribute_checks.alternative, always)))

    @cached_property
    def input_contract(self) -> tuple:
        """What decoding and :func:`check_batch` make of a request for this model: the axes,
        the range policy and every value check.  Two versions with equal contracts decode
        any request to the same batch and judge it alike (built once)."""

        def checks(c: ValueChecks) -> tuple:
            arrays = (c.alternative, c.index, c.domain, c.low, c.high)
            return (c.fields, *(a.tobytes() for a in arrays))

        return (
            self.alternatives,
            self.attributes,
            self.context,
            self.spec.range_policy,
            checks(self.attribute_checks),
            checks(self.context_checks),
            self.unset_values[0].tobytes(),
            self.unset_values[1].tobytes(),
        )

    @property
    def required_attributes(self) -> tuple[tuple[str, str], ...]:
        """(alternative, attribute) pairs the model uses: what a request must supply."""
        js, as_ = np.nonzero(self.required)
        return tuple(
            (self.alternatives[j], self.attributes[a]) for j, a in zip(js, as_, strict=True)
        )

    @property
    def required_context(self) -> tuple[str, ...]:
        """Context variables the model uses."""
        return tuple(
            c for c, used in zip(self.context, self.required_context_mask, strict=True) if used
        )

    def alternative_index(self, alternative: str) -> int:
        return self.alternatives.index(alternative)

    def attribute_index(self, attribute: str) -> int:
        return self.attributes.index(attribute)


def _read_only(a: np.ndarray) -> np.ndarray:
    a.setflags(write=False)
    return a


def compile_model(spec: ModelSpec, coefficients: Coefficients) -> CompiledModel:
    """Validate (:func:`validate_model`, raises ``SpecError``) and compile into arrays."""
    validate_model(spec, coefficients)
    alternatives = spec.alternative_ids
    attributes = tuple(v.name for v in spec.attributes)
    context = tuple(v.name for v in spec.context)
    j_of = {a: i for i, a in enumerate(alternatives)}
    a_of = {a: i for i, a in enumerate(attributes)}
    c_of = {c: i for i, c in enumerate(context)}
    k_of = {n: i for i, n in enumerate(coefficients.names)}
    beta = np.array(coefficients.estimates, dtype=np.float64)
    beta.setflags(write=False)

    rows = [
        (
            j_of[alt],
            NONE if t.attribute is None else a_of[t.attribute],
            NONE if t.context is None else c_of[t.context],
            TRANSFORM_CODES[t.transform],
            k_of[t.coefficient],
        )
        for alt in alternatives
        for t in spec.utilities.get(alt, ())
    ]
    cols = np.array(rows, dtype=np.intp).reshape(-1, 5).T
    terms = TermArrays(*(np.ascontiguousarray(c) for c in cols))

    n_j, n_a, n_c = len(alternatives), len(attributes), len(context)
    linear = np.zeros((n_j, n_a))
    constants = np.zeros(n_j)
    is_linear = (terms.attribute != NONE) & (terms.transform == IDENTITY) & (terms.context == NONE)
    is_constant = (terms.attribute == NONE) & (terms.context == NONE)
    np.add.at(
        linear,
        (terms.alternative[is_linear], terms.attribute[is_linear]),
        beta[terms.coefficient[is_linear]],
    )
    np.add.at(constants, terms.alternative[is_constant], beta[terms.coefficient[is_constant]])
    general = terms.select(~is_linear & ~is_constant)

    def cells(mask: np.ndarray) -> np.ndarray:
        out = np.zeros((n_j, n_a), dtype=bool)
        out[terms.alternative[mask], terms.attribute[mask]] = True
        return out

    has_attr = terms.attribute != NONE
    required_context_mask = np.zeros(n_c, dtype=bool)
    required_context_mask[terms.context[terms.context != NONE]] = True

    required = cells(has_attr)
    log_cells = cells(has_attr & (terms.transform == LOG))
    log1p_cells = cells(has_attr & (terms.transform == LOG1P))
    js, as_ = np.nonzero(required)
    attribute_checks = _value_checks(
        [("attributes", alternatives[j], attributes[a]) for j, a in zip(js, as_, strict=True)],
        list(js),
        list(as_),
        [
            0.0 if log_cells[j, a] else -1.0 if log1p_cells[j, a] else -np.inf
            for j, a in zip(js, as_, strict=True)
        ],
        [(spec.attributes[a].low, spec.attributes[a].high) for a in as_],
        spec.range_policy,
    )
    cs = np.flatnonzero(required_context_mask)
    context_checks = _value_checks(
        [("context", context[c]) for c in cs],
        [NONE] * len(cs),
        list(cs),
        [-np.inf] * len(cs),
        [(spec.context[c].low, spec.context[c].high) for c in cs],
        spec.range_policy,
    )

    nest_kwargs = {}
    if spec.nests:
        nest_of = np.full(n_j, NONE, dtype=np.intp)
        for m, nest in enumerate(spec.nests):
            nest_of[[j_of[a] for a in nest.alternatives]] = m
        scale_index = np.array([k_of[n.scale] for n in spec.nests], dtype=np.intp)
        nest_kwargs = {
            "nest_ids": tuple(n.id for n in spec.nests),
            "nest_of": nest_of,
            "nest_scale_index": scale_index,
            "nest_scales": beta[scale_index],
        }
    return CompiledModel(
        spec=spec,
        coefficients=coefficients,
        alternatives=alternatives,
        attributes=attributes,
        context=context,
        cost_attribute=spec.cost_attribute,
        beta=beta,
        terms=terms,
        linear=linear,
        constants=constants,
        general=_term_block(general, beta, n_j, n_a),
        required=required,
        required_context_mask=required_context_mask,
        log_cells=log_cells,
        log1p_cells=log1p_cells,
        attribute_checks=attribute_checks,
        context_checks=context_checks,
        **nest_kwargs,
    )
