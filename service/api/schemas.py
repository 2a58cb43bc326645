"""marshmallow schemas of every request and response (the OpenAPI document is built from them).

Request schemas validate shapes and types; whether values can be scored (attributes a model
uses, finite values, domains, ranges) is checked on arrays by the core (``check_batch``).
Bulk columns (columnar form) are converted to NumPy arrays in one step per column, so a large
batch never pays a per-value schema cost.  Response schemas document what the views build;
the tests load real responses through them.
"""

from __future__ import annotations

import math
import sys
from typing import Any

import numpy as np
from marshmallow import RAISE, Schema, ValidationError, fields, validate, validates_schema

NAME = validate.Regexp(r"^[A-Za-z_][A-Za-z0-9_.-]{0,63}$", error="not a valid name")
KEY = validate.Length(min=1, max=256)


class Number(fields.Float):
    """A JSON number (not a string or boolean); NaN/Infinity parse and are refused at 422."""

    def __init__(self, **kwargs: Any):
        super().__init__(allow_nan=True, **kwargs)

    def _deserialize(self, value: Any, attr: Any, data: Any, **kwargs: Any) -> float:
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise ValidationError("must be a number")
        return float(value)


class StrictBool(fields.Boolean):
    def _deserialize(self, value: Any, attr: Any, data: Any, **kwargs: Any) -> bool:
        if not isinstance(value, bool):
            raise ValidationError("must be true or false")
        return value


class QueryBool(fields.Boolean):
    """A query-string flag: true/false (also 1/0, yes/no)."""

    truthy = frozenset({"true", "1", "yes"})
    falsy = frozenset({"false", "0", "no"})


def _array(value: list) -> np.ndarray | None:
    """The list as one array, or None when it is ragged (nested lists of unequal lengths)."""
    try:
        return np.asarray(value)
    except (ValueError, TypeError, OverflowError):
        return None


def _number_problem(value: Any) -> str | None:
    """Why one item of a number column is not a JSON number (None: it is one)."""
    if type(value) is float:
        return None
    if type(value) is int:
        return None if abs(value) <= sys.float_info.max else "is too large for a number"
    return "must be a number (not a string, boolean, null or list)"


def _bool_problem(value: Any) -> str | None:
    return None if type(value) is bool else "must be true or false"


def _item_errors(value: list, problem: Any) -> dict[int, list[str]]:
    """The first offending items by index (marshmallow's form: paths end in ``[i]``); only
    on the error path: a valid column pays one ``bool in map(type, ...)`` scan, at C speed."""
    errors: dict[int, list[str]] = {}
    for i, item in enumerate(value):
        message = problem(item)
        if message is not None:
            errors[i] = [message]
            if len(errors) >= 20:
                break
    return errors


class NumberColumn(fields.Field):
    """A list of JSON numbers, loaded as one float64 array (vectorised type check; booleans,
    which NumPy would read as 1 and 0 beside numbers, are found by their type)."""

    def __init__(self, **kwargs: Any):
        kwargs.setdefault("metadata", {}).update(type="array", items={"type": "number"})
        super().__init__(**kwargs)

    def _deserialize(self, value: Any, attr: Any, data: Any, **kwargs: Any) -> np.ndarray:
        if not isinstance(value, list):
            raise ValidationError("must be a list of numbers")
        arr = _array(value) if value else np.zeros(0)
        if arr is None or arr.ndim != 1 or arr.dtype.kind not in "iuf" or bool in map(type, value):
            errors = _item_errors(value, _number_problem)
            if errors:
                raise ValidationError(errors)
            arr = np.array(value, dtype=np.float64)  # integers beyond int64, all numbers
        return arr.astype(np.float64, copy=False)


class BoolColumn(fields.Field):
    def __init__(self, **kwargs: Any):
        kwargs.setdefault("metadata", {}).update(type="array", items={"type": "boolean"})
        super().__init__(**kwargs)

    def _deserialize(self, value: Any, attr: Any, data: Any, **kwargs: Any) -> np.ndarray:
        if not isinstance(value, list):
            raise ValidationError("must be a list of true/false")
        arr = _array(value) if value else np.zeros(0, dtype=bool)
        if arr is None or arr.ndim != 1 or arr.dtype.kind != "b":
            raise ValidationError(_item_errors(value, _bool_problem))
        return arr


class IdColumn(fields.Field):
    def __init__(self, **kwargs: Any):
        kwargs.setdefault("metadata", {}).update(type="array", items={"type": "string"})
        super().__init__(**kwargs)

    def _deserialize(self, value: Any, attr: Any, data: Any, **kwargs: Any) -> list[str]:
        if not isinstance(value, list) or not all(
            isinstance(v, str) and 0 < len(v) <= 256 for v in value
        ):
            raise ValidationError("must be a list of strings of 1-256 characters")
        if len(set(value)) != len(value):
            raise ValidationError("situation ids must be unique")
        return value


class Strict(Schema):
    class Meta:
        unknown = RAISE


# -- requests ---------------------------------------------------------------------------


class OutputsSchema(Strict):
    """What to return; probabilities by default."""

    probabilities = StrictBool(load_default=True)
    logsum = StrictBool(load_default=False, metadata={"description": "ln sum_j exp V_j"})
    expected_max_utility = StrictBool(
        load_default=False, metadata={"description": "logsum + Euler's constant"}
    )
    surplus = StrictBool(
        load_default=False,
        metadata={"description": "consumer surplus logsum / alpha, alpha = -dV/d(cost)"},
    )
    elasticities = fields.List(
        fields.String(validate=NAME),
        load_default=list,
        metadata={"description": "attributes or context variables to differentiate by"},
    )
    aggregate = StrictBool(
        load_default=False, metadata={"description": "weighted shares and elasticities"}
    )
    std_errors = StrictBool(
        load_default=False,
        metadata={"description": "delta-method standard errors of the probabilities"},
    )


class SituationSchema(Strict):
    id = fields.String(validate=KEY, metadata={"description": "defaults to the index"})
    attributes = fields.Dict(
        keys=fields.String(),
        values=fields.Dict(keys=fields.String(), values=Number()),
        load_default=dict,
        metadata={"description": "attribute values by alternative id, then attribute name"},
    )
    context = fields.Dict(keys=fields.String(), values=Number(), load_default=dict)
    available = fields.Dict(
        keys=fields.String(),
        values=StrictBool(),
        load_default=dict,
        metadata={"description": "alternatives default to available"},
    )
    weight = Number(load_default=1.0)


class ColumnsSchema(Strict):
    """One value per situation in every column."""

    id = IdColumn(metadata={"description": "situation ids; default the index"})
    attributes = fields.Dict(
        keys=fields.String(),
        values=fields.Dict(keys=fields.String(), values=NumberColumn()),
        load_default=dict,
    )
    context = fields.Dict(keys=fields.String(), values=NumberColumn(), load_default=dict)
    available = fields.Dict(keys=fields.String(), values=BoolColumn(), load_default=dict)
    weight = NumberColumn()


class SituationList(fields.List):
    """Situations: documented by :class:`SituationSchema`, checked here only as a list of
    objects with string ids. Their values are checked on arrays by the core
    (``Batch.from_records`` then ``check_batch``), which names each offending field, so a
    large request never pays marshmallow's per-value cost."""

    def __init__(self, **kwargs: Any):
        super().__init__(fields.Nested(SituationSchema), **kwargs)

    def _deserialize(self, value: Any, attr: Any, data: Any, **kwargs: Any) -> list[dict]:
        if not isinstance(value, list):
            raise ValidationError("must be a list of situations")
        errors: dict[int, Any] = {}
        seen: set[str] = set()
        unnamed: list[int] = []
        for i, item in enumerate(value):
            if not isinstance(item, dict):
                errors[i] = ["must be an object"]
                continue
            if "id" not in item:
                unnamed.append(i)
                continue
            sid = item["id"]
            if not isinstance(sid, str) or not 0 < len(sid) <= 256:
                errors[i] = {"id": ["must be a string of 1-256 characters"]}
            elif sid in seen:
                errors[i] = {"id": [f"duplicate situation id {sid!r}"]}
            else:
                seen.add(sid)
            if len(errors) >= 100:
                break
        for i in unnamed:  # a situation without an id is answered under its index
            if str(i) in seen and len(errors) < 100:
                errors[i] = {"id": [f"missing, and its index {str(i)!r} is another situation's id"]}
        if errors:
            raise ValidationError(errors)
        return value


class ScoreRequestSchema(Strict):
    routing_key = fields.String(
        validate=KEY, metadata={"description": "the same key meets the same version"}
    )
    outputs = fields.Nested(OutputsSchema, data_key="return")
    situations = SituationList()
    columns = fields.Nested(ColumnsSchema)

    @validates_schema
    def _one_form(self, data: dict[str, Any], **kwargs: Any) -> None:
        if ("situations" in data) == ("columns" in data):
            raise ValidationError("give exactly one of situations (rows) or columns")


class ArrowQuerySchema(Strict):
    """Options of an Arrow request, as query parameters (comma-separated lists)."""

    routing_key = fields.String(validate=KEY)
    probabilities = QueryBool(load_default=True)
    logsum = QueryBool(load_default=False)
    expected_max_utility = QueryBool(load_default=False)
    surplus = QueryBool(load_default=False)
    elasticities = fields.String(load_default="")
    aggregate = QueryBool(load_default=False)
    std_errors = QueryBool(load_default=False)


class ChangeSchema(Strict):
    alternative = fields.String(required=True)
    attribute = fields.String(required=True)
    op = fields.String(required=True, validate=validate.OneOf(("set", "add", "multiply")))
    value = Number(required=True)


class VariantSchema(Strict):
    name = fields.String(required=True, validate=KEY)
    changes = fields.List(fields.Nested(ChangeSchema), load_default=list)
    remove = fields.List(
        fields.String(), load_default=list, metadata={"description": "alternatives removed"}
    )
    add = fields.List(
        fields.String(),
        load_default=list,
        metadata={"description": "alternatives made available (give their attributes)"},
    )


class ScenarioRequestSchema(Strict):
    routing_key = fields.String(validate=KEY)
    version = fields.String(
        validate=KEY, metadata={"description": "pin a version (bypasses routing)"}
    )
    situations = SituationList()
    columns = fields.Nested(ColumnsSchema)
    variants = fields.List(
        fields.Nested(VariantSchema), required=True, validate=validate.Length(min=1, max=64)
    )

    @validates_schema
    def _one_form(self, data: dict[str, Any], **kwargs: Any) -> None:
        if ("situations" in data) == ("columns" in data):
            raise ValidationError("give exactly one of situations (rows) or columns")


class RoutingChangeSchema(Strict):
    live = fields.Dict(
        keys=fields.String(validate=KEY),
        values=Number(validate=validate.Range(min=0, max=1e6)),
        required=True,
        metadata={"description": "weights by version (normalised)"},
    )
    shadow = fields.String(
        allow_none=True,
        metadata={"description": "a version scored alongside; null: none; omitted: kept"},
    )
    expected_generation = fields.Integer(
        strict=True, metadata={"description": "refuse the change (409) if routing moved on"}
    )
    reason = fields.String(
        required=True, validate=validate.Length(min=1, max=1000), metadata={"description": "why"}
    )


class PromoteSchema(Strict):
    version = fields.String(required=True, validate=KEY)
    expected_generation = fields.Integer(strict=True)
    reason = fields.String(validate=validate.Length(max=1000))


class RollbackSchema(Strict):
    expected_generation = fields.Integer(strict=True)
    reason = fields.String(validate=validate.Length(max=1000))


# -- responses --------------------------------------------------------------------------


class FiniteNumber(fields.Float):
    def _deserialize(self, value: Any, attr: Any, data: Any, **kwargs: Any) -> float:
        out = super()._deserialize(value, attr, data, **kwargs)
        if not math.isfinite(out):
            raise ValidationError("must be finite")
        return out


class RoutingInfoSchema(Schema):
    decision = fields.String(validate=validate.OneOf(("pinned", "key-sticky", "random")))
    generation = fields.Integer(allow_none=True)


class FieldErrorSchema(Schema):
    path = fields.String(required=True)
    message = fields.String(required=True)


Matrix = fields.Dict(
    keys=fields.String(), values=fields.Dict(keys=fields.String(), values=FiniteNumber())
)


class SituationResultSchema(Schema):
    id = fields.String(required=True)
    probabilities = fields.Dict(keys=fields.String(), values=FiniteNumber())
    probability_std_errors = fields.Dict(keys=fields.String(), values=FiniteNumber())
    logsum = FiniteNumber()
    expected_max_utility = FiniteNumber()
    surplus = FiniteNumber()
    elasticities = fields.Dict(
        keys=fields.String(),
        values=fields.Dict(keys=fields.String(), values=fields.Raw()),
        metadata={
            "description": "by variable, then alternative i, then alternative k: elasticity of "
            "P_i with respect to the attribute of k (a number per i for a context variable)"
        },
    )
    marginal_effects = fields.Dict(
        keys=fields.String(),
        values=fields.Dict(keys=fields.String(), values=fields.Raw()),
        metadata={"description": "dP_i/dx, laid out as elasticities"},
    )


class AggregateSchema(Schema):
    shares = fields.Dict(keys=fields.String(), values=FiniteNumber())
    elasticities = fields.Dict(keys=fields.String(), values=fields.Raw())


class ScoreResponseSchema(Schema):
    model = fields.String(required=True)
    version = fields.String(required=True)
    routing = fields.Nested(RoutingInfoSchema, required=True)
    alternatives = fields.List(fields.String(), required=True)
    situations = fields.List(fields.Nested(SituationResultSchema))
    columns = fields.Dict(
        keys=fields.String(), values=fields.Raw(), metadata={"description": "columnar results"}
    )
    aggregate = fields.Nested(AggregateSchema)
    warnings = fields.List(
        fields.Nested(FieldErrorSchema),
        metadata={"description": "inputs outside the estimation range (first 100)"},
    )
    warning_count = fields.Integer()


class VariantResultSchema(Schema):
    name = fields.String(required=True)
    shares = fields.Dict(keys=fields.String(), values=FiniteNumber(), required=True)
    revenue_total = FiniteNumber(
        allow_none=True, metadata={"description": "sum_n w_n sum_j P_nj cost_nj"}
    )
    share_deltas = fields.Dict(keys=fields.String(), values=FiniteNumber())
    surplus_change_total = FiniteNumber(
        allow_none=True, metadata={"description": "sum_n w_n (logsum_1 - logsum_0) / alpha"}
    )
    surplus_change_mean = FiniteNumber(allow_none=True)
    revenue_change_total = FiniteNumber(allow_none=True)
    warnings = fields.List(
        fields.Nested(FieldErrorSchema),
        metadata={
            "description": "a variant's own inputs outside the estimation range, at the "
            "change behind each (base values are warned once, at the top level)"
        },
    )


class ScenarioResponseSchema(Schema):
    model = fields.String(required=True)
    version = fields.String(required=True)
    routing = fields.Nested(RoutingInfoSchema, required=True)
    alternatives = fields.List(fields.String(), required=True)
    base = fields.Nested(VariantResultSchema, required=True)
    variants = fields.List(fields.Nested(VariantResultSchema), required=True)
    surplus_unavailable = fields.String(allow_none=True)
    warnings = fields.List(
        fields.Nested(FieldErrorSchema),
        metadata={"description": "base inputs outside the estimation range (first 100)"},
    )
    warning_count = fields.Integer()


class ProblemSchema(Schema):
    type = fields.String(required=True)
    title = fields.String(required=True)
    status = fields.Integer(required=True)
    detail = fields.String(required=True)
    instance = fields.String(allow_none=True)
    errors = fields.List(fields.Nested(FieldErrorSchema))
    request_id = fields.String(allow_none=True)


class RoutingStateSchema(Schema):
    generation = fields.Integer(required=True)
    live = fields.Dict(keys=fields.String(), values=FiniteNumber(), required=True)
    shadow = fields.String(allow_none=True)
    # The routing endpoints return the whole history record.
    format_version = fields.Integer()
    model = fields.String()
    previous_generation = fields.Integer(allow_none=True)
    action = fields.String(allow_none=True)
    changed_by = fields.String(allow_none=True)
    changed_at = fields.String(allow_none=True)
    reason = fields.String(allow_none=True)
    restored_generation = fields.Integer(allow_none=True)


class ModelSummarySchema(Schema):
    name = fields.String(required=True)
    versions = fields.List(fields.String(), required=True)
    routing = fields.Nested(RoutingStateSchema, allow_none=True)
    family = fields.String(allow_none=True)
    alternatives = fields.List(fields.String())
    attributes = fields.List(fields.Dict())
    context = fields.List(fields.Dict())
    cost_attribute = fields.String(allow_none=True)


class ModelListSchema(Schema):
    models = fields.List(fields.Nested(ModelSummarySchema), required=True)


class WillingnessToPaySchema(Schema):
    coefficient = fields.String(required=True)
    value = FiniteNumber(required=True)
    std_error = FiniteNumber(allow_none=True)


class VersionDetailSchema(Schema):
    model = fields.String(required=True)
    version = fields.String(required=True)
    spec = fields.Dict(required=True)
    coefficients = fields.List(fields.Dict(), required=True)
    has_covariance = fields.Boolean(required=True)
    willingness_to_pay = fields.List(
        fields.Nested(WillingnessToPaySchema),
        allow_none=True,
        metadata={"description": "-beta_k / beta_cost per coefficient, delta-method std errors"},
    )
    willingness_to_pay_unavailable = fields.String(allow_none=True)
    manifest = fields.Dict(allow_none=True)


class HealthSchema(Schema):
    status = fields.String(required=True)
    reasons = fields.List(fields.String())
    models = fields.Dict(keys=fields.String(), values=fields.Raw())


class RoutingHistorySchema(Schema):
    model = fields.String(required=True)
    entries = fields.List(fields.Dict(), required=True)
