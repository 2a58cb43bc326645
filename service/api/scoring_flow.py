"""The steps of a scoring request between the view and the core: parse the body by media type,
decode it against a model, check and score it, and score the shadow version afterwards."""

from __future__ import annotations

import functools
import json
import logging
import struct
from dataclasses import dataclass
from typing import Any

import numpy as np
from flask import request
from marshmallow import ValidationError

from service.choice import (
    Batch,
    BatchCheck,
    ScoreOptions,
    ScoreResult,
    ScoringError,
    check_batch,
    score,
)
from service.choice.probabilities import UtilityNotFinite

from . import metrics
from .codecs.arrow import MEDIA_TYPE as ARROW
from .codecs.arrow import decode_arrow
from .codecs.columns import column_length, decode_columns
from .codecs.decoded import Decoded
from .codecs.ipc_limits import decoded_body_size, dictionary_expansion
from .codecs.results import Outputs, clear_negative_zeros, outputs_from, require_finite
from .codecs.rows import decode_rows
from .config import Settings
from .problems import (
    ApiError,
    FieldError,
    bad_request,
    marshmallow_errors,
    too_large,
    unprocessable,
    unsupported_media_type,
)
from .registry import Registry
from .schemas import ArrowQuerySchema, OutputsSchema, ScoreRequestSchema

log = logging.getLogger("choicecast.scoring")

JSON = "application/json"
# Schema instances are reused: building one deep-copies its fields (about 1 ms each).
SCORE_REQUEST = ScoreRequestSchema()
DEFAULT_OUTPUTS = outputs_from(OutputsSchema().load({}))
ARROW_QUERY = ArrowQuerySchema()


@dataclass(frozen=True, eq=False)
class ParsedRequest:
    form: str
    """``rows``, ``columns`` or ``arrow``."""
    payload: Any
    """The situations list, the columns mapping or the Arrow table."""
    outputs: Outputs = DEFAULT_OUTPUTS
    routing_key: str | None = None


_ENCODER = json.JSONEncoder(allow_nan=False, separators=(",", ":"))


def dumps(body: Any) -> str:
    """JSON text; refuses NaN/Infinity (they are checked away before encoding)."""
    return _ENCODER.encode(body)


def read_json(accepted: str = JSON) -> Any:
    """The JSON body; ``accepted`` names the media types the endpoint takes (for the 415)."""
    if request.mimetype != JSON:
        raise unsupported_media_type(
            f"send {accepted}, not {request.mimetype or 'no content type'!r}"
        )
    raw = read_body()
    try:
        return json.loads(raw)
    except (ValueError, RecursionError) as exc:
        raise bad_request(
            f"the body is not valid JSON: {exc}", [FieldError("$", "invalid JSON")]
        ) from None


def read_body() -> bytes:
    """The whole body.  A body that declares its length is refused by werkzeug (413) when it
    is over max_content_length; a chunked one is cut there without a word, so one more byte
    read then raises the 413 instead of passing on a truncated body."""
    raw = request.get_data(cache=False)
    if request.content_length is None:
        limit = request.max_content_length
        if limit is not None and len(raw) >= limit:
            request.stream.read(1)
    return raw


def situation_count(data: Any) -> int:
    if isinstance(data, dict):
        if isinstance(data.get("situations"), list):
            return len(data["situations"])
        if isinstance(data.get("columns"), dict):
            cols = data["columns"]
            if isinstance(cols.get("id"), list):
                return len(cols["id"])
    return 0


def check_size(n: int, limit: int) -> None:
    if n > limit:
        raise too_large(
            f"{n} situations exceed the limit of {limit} per request (max_situations)",
            [FieldError("$.situations", f"at most {limit} situations per request")],
        )


def parse_score_request(config: Settings) -> ParsedRequest:
    """The body as rows, columns or an Arrow table, with the options (400/413/415 problems)."""
    if request.mimetype == ARROW:
        return _parse_arrow(config.max_body_bytes)
    if request.args:
        raise bad_request(
            "a JSON request takes its options in the body (return, routing_key); query "
            "parameters are for Arrow requests",
            [FieldError(f"query.{k}", "unknown for a JSON request") for k in request.args],
        )
    data = read_json(f"{JSON} or {ARROW}")
    check_size(situation_count(data), config.max_situations)
    loaded = SCORE_REQUEST.load(data) if isinstance(data, dict) else _not_object()
    outputs = outputs_from(loaded["outputs"]) if loaded.get("outputs") else DEFAULT_OUTPUTS
    if "situations" in loaded:
        return ParsedRequest("rows", loaded["situations"], outputs, loaded.get("routing_key"))
    check_size(column_length(loaded["columns"]), config.max_situations)
    return ParsedRequest("columns", loaded["columns"], outputs, loaded.get("routing_key"))


def _not_object() -> Any:
    raise bad_request("the body must be a JSON object", [FieldError("$", "must be an object")])


def _parse_arrow(limit: int) -> ParsedRequest:
    import pyarrow as pa

    given = request.args.to_dict(flat=False)
    repeated = [
        FieldError(f"query.{k}", "is given more than once") for k, v in given.items() if len(v) > 1
    ]
    if repeated:
        raise bad_request("the query parameters are not valid", repeated)
    try:
        query = ARROW_QUERY.load({k: v[0] for k, v in given.items()})
    except ValidationError as exc:
        raise bad_request(
            "the query parameters are not valid", marshmallow_errors(exc.messages, "query")
        ) from None
    raw = read_body()
    try:
        decoded_size = decoded_body_size(raw)
        if decoded_size <= limit:
            table = pa.ipc.open_stream(raw).read_all()
    except (pa.ArrowInvalid, pa.ArrowException, OSError, ValueError, struct.error) as exc:
        raise bad_request(
            f"the body is not an Arrow IPC stream: {exc}",
            [FieldError("$", "invalid Arrow IPC stream")],
        ) from None
    if decoded_size > limit or dictionary_expansion(table) > limit:
        raise too_large(
            f"the Arrow stream decodes to more than the configured limit of {limit} bytes "
            "(max_body_bytes; compressed buffers and dictionary columns count decoded)",
            [FieldError("$", "decodes to too many bytes")],
        )
    options = {k: v for k, v in query.items() if k != "routing_key"}
    options["elasticities"] = [e.strip() for e in query["elasticities"].split(",") if e.strip()]
    return ParsedRequest("arrow", table, outputs_from(options), query.get("routing_key"))


def decode(parsed: ParsedRequest, model: Any) -> Decoded:
    if parsed.form == "rows":
        decoded = decode_rows(model, parsed.payload)
    elif parsed.form == "columns":
        decoded = decode_columns(model, parsed.payload)
    else:
        decoded = decode_arrow(model, parsed.payload)
    return decoded


def refusal(decoded: Decoded, check: BatchCheck) -> ApiError:
    """The 422 of a request whose values fail decoding or :func:`check_batch`: the first
    problems by field and the true count (a field named twice counts once)."""
    listed, count = decoded.refusals(check)
    omitted = count - len(listed)
    more = f" ({omitted} more not listed)" if omitted > 0 else ""
    return unprocessable(f"{count} value(s) cannot be scored{more}", listed)


def not_finite(decoded: Decoded, exc: UtilityNotFinite) -> ApiError:
    """The 422 of situations whose inputs passed the checks but overflow a utility, each named
    in the request's own form (as :func:`refusal` names check findings)."""
    listed = decoded.errors(exc.situations)
    omitted = exc.count - len(listed)
    more = f" ({omitted} more not listed)" if omitted > 0 else ""
    return unprocessable(
        f"{exc.count} situation(s) cannot be scored: an input value is too large{more}", listed
    )


def options_path(path: str, form: str) -> str:
    """A core option path (``options.elasticities[0]``) as the caller wrote it."""
    if path.startswith("options."):
        rest = path.removeprefix("options.")
        return f"query.{rest}" if form == "arrow" else f"$.return.{rest}"
    return path if path.startswith("$") else f"$.{path}"


FORM_WEIGHT = {"arrow": 1, "columns": 2, "rows": 4}
"""Memory per work unit relative to Arrow (measured: about 34, 55-75 and 190 bytes; the
JSON forms hold every output value as a Python object)."""


def work_units(n: int, model: Any, outputs: Outputs, form: str) -> int:
    """The work a scoring request causes, in array values:
    N J^2 (1 + elasticities) (the derivatives d ln P_i / d V_j and, per elasticity, the
    elasticities and marginal effects) plus N J K with ``std_errors`` (the utility design),
    times :data:`FORM_WEIGHT` of the request form."""
    n_j, n_k = len(model.alternatives), len(model.coefficients.names)
    work = n * n_j * n_j * (1 + len(outputs.elasticities))
    if outputs.std_errors:
        work += n * n_j * n_k
    return work * FORM_WEIGHT[form]


def check_work(n: int, model: Any, outputs: Outputs, form: str, limit: int) -> None:
    """413 naming the options that multiply the work, when it exceeds ``limit``."""
    work = work_units(n, model, outputs, form)
    if work <= limit:
        return
    where = "query." if form == "arrow" else "$.return."
    rows = {"rows": "$.situations", "columns": "$.columns", "arrow": "$"}[form]
    errors = [FieldError(rows, f"{n} situations x {len(model.alternatives)}^2 alternatives")]
    if outputs.elasticities:
        errors.append(
            FieldError(
                f"{where}elasticities",
                f"{len(outputs.elasticities)} elasticities multiply the work by "
                f"{1 + len(outputs.elasticities)}",
            )
        )
    if outputs.std_errors:
        errors.append(
            FieldError(
                f"{where}std_errors",
                f"adds situations x alternatives x {len(model.coefficients.names)} coefficients",
            )
        )
    raise too_large(
        f"the request would cause {work:,} units of work, more than the limit of {limit:,} "
        "(max_work): send fewer situations per request, or ask for fewer elasticities or "
        "without std_errors",
        errors,
    )


@functools.lru_cache(maxsize=256)
def score_options(outputs: Outputs) -> ScoreOptions:
    """What the core computes for what the caller asked (the few distinct option sets a
    service sees are built once)."""
    return ScoreOptions(
        probabilities=True,
        logsum=outputs.logsum or outputs.expected_max_utility,
        surplus=outputs.surplus,
        elasticities=outputs.elasticities,
        aggregate=outputs.aggregate,
        std_errors=outputs.std_errors,
    )


def run_score(
    model: Any, decoded: Decoded, outputs: Outputs, form: str, max_work: int
) -> tuple[ScoreResult, BatchCheck, list[FieldError]]:
    """Check then score; every refusal is a 422 naming the fields (413 over ``max_work``)."""
    check_work(decoded.batch.size, model, outputs, form, max_work)
    check = check_batch(model, decoded.batch)
    if check.problems or decoded.problems:
        raise refusal(decoded, check)
    options = score_options(outputs)
    try:
        # Extreme inputs may overflow inside the core; the result is checked for finiteness
        # below and refused with 422, so numpy's warnings would only be noise.
        with np.errstate(all="ignore"):
            result = score(model, check.batch, options)
    except UtilityNotFinite as exc:
        raise not_finite(decoded, exc) from None
    except ScoringError as exc:
        raise unprocessable(
            "the options cannot be served by this model version",
            [FieldError(options_path(p.path, form), p.message) for p in exc.problems],
        ) from None
    require_finite(result, decoded.locate)
    clear_negative_zeros(result)
    return result, check, decoded.errors(check.warnings)


def shadow_score(
    reg: Registry,
    name: str,
    live_version: str,
    shadow_version: str,
    parsed: ParsedRequest,
    live_model: Any,
    live_batch: Batch,
    live_p: np.ndarray,
) -> None:
    """Score the shadow version on the same input and record max |dP|; never raises.

    When the shadow's input contract equals the live version's (same axes, policy and
    checks: a re-estimate of the same specification), the live check stands for it and its
    checked batch is scored directly; otherwise the request is decoded and checked again."""
    try:
        loaded = reg.get(name, shadow_version)
        model = loaded.compiled
        if model.input_contract == live_model.input_contract:
            batch = live_batch
        else:
            decoded = decode(parsed, model)
            check = check_batch(model, decoded.batch)
            if check.problems or decoded.problems:
                raise ValueError(f"{check.problem_count} problem(s) in the shadow check")
            batch = check.batch
        with np.errstate(all="ignore"):
            result = score(model, batch, ScoreOptions(probabilities=True, logsum=False))
        live_alternatives = live_model.alternatives
        shared = [a for a in live_alternatives if a in model.alternatives]
        live_idx = [live_alternatives.index(a) for a in shared]
        shadow_idx = [model.alternatives.index(a) for a in shared]
        assert result.probabilities is not None
        dp = np.abs(result.probabilities[:, shadow_idx] - live_p[:, live_idx])
        divergence = float(dp.max()) if dp.size else 0.0
        if not np.isfinite(divergence):
            raise ValueError("non-finite shadow probabilities")
        metrics.child(metrics.SHADOW_DIVERGENCE, name, live_version, shadow_version).observe(
            divergence
        )
        metrics.child(metrics.SHADOW_LAST, name, live_version, shadow_version).set(divergence)
    except Exception as exc:  # the shadow never fails a request
        metrics.child(metrics.SHADOW_FAILURES, name, shadow_version).inc()
        log.warning("shadow scoring of %s/%s failed: %s", name, shadow_version, exc)
