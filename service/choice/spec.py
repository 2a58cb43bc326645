"""The in-memory model specification and its validation.

A model version is a :class:`ModelSpec` (structure) plus :class:`Coefficients` (numbers).
Utility of alternative j (the linear-in-parameters form, Train 2009, sec. 2.5 and 3.1):

    V_j = sum over the terms of j of  beta[coef] * t(x_j[attr]) * z[context]

where a term may omit ``attribute`` (t(x) = 1, an alternative-specific constant) and
omit ``context`` (z = 1); t is one of :data:`TRANSFORMS`.  A coefficient name used by
several alternatives is generic, one used by a single alternative is specific.

Everything here is pure: parsing plain dicts (already decoded JSON) and checking them.
Every refusal is a :class:`SpecError` carrying one :class:`Problem` per offending field,
each with a dotted/indexed path such as ``utilities.bus[1].attribute``.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

FAMILIES = ("binary", "multinomial", "nested")
"""Families this version scores. ("mixed" is reserved in the artifact format, refused here.)"""
TRANSFORMS = ("identity", "log", "log1p")
RANGE_POLICIES = ("warn", "reject", "clip")
ROLES = ("cost",)
NAME_PATTERN = re.compile(r"^[A-Za-z_][A-Za-z0-9_.-]{0,63}\Z")
"""Identifiers of alternatives, attributes, context variables, coefficients and nests."""


@dataclass(frozen=True)
class Problem:
    """One thing wrong with an input, located by ``path``."""

    path: str
    message: str

    def as_dict(self) -> dict[str, str]:
        return {"path": self.path, "message": self.message}


class SpecError(ValueError):
    """A model specification or coefficient set that cannot be scored."""

    def __init__(self, problems: Sequence[Problem]):
        self.problems = tuple(problems)
        super().__init__("; ".join(f"{p.path}: {p.message}" for p in self.problems))


@dataclass(frozen=True)
class Alternative:
    id: str
    label: str | None = None
    outside: bool = False
    """A no-purchase (outside) option; conventionally its utility is normalised to 0."""


@dataclass(frozen=True)
class Variable:
    """An attribute of alternatives or a context variable of the decision maker."""

    name: str
    unit: str | None = None
    low: float | None = None
    high: float | None = None
    """The range seen in estimation (either bound may be absent)."""
    role: str | None = None
    """``"cost"`` marks the price attribute (consumer surplus, revenue, willingness to pay)."""


@dataclass(frozen=True)
class Term:
    coefficient: str
    attribute: str | None = None
    context: str | None = None
    transform: str = "identity"


@dataclass(frozen=True)
class Nest:
    id: str
    scale: str
    """Name of the coefficient holding the nest's scale (dissimilarity) parameter lambda."""
    alternatives: tuple[str, ...]


@dataclass(frozen=True)
class ModelSpec:
    name: str
    family: str
    alternatives: tuple[Alternative, ...]
    attributes: tuple[Variable, ...]
    context: tuple[Variable, ...]
    utilities: Mapping[str, tuple[Term, ...]]
    """Terms of each alternative, by alternative id (an alternative may have none: V = 0)."""
    nests: tuple[Nest, ...] = ()
    range_policy: str = "warn"
    allow_scale_above_one: bool = False
    """Accept nest scales above 1 (not consistent with utility maximisation for all data)."""

    @property
    def alternative_ids(self) -> tuple[str, ...]:
        return tuple(a.id for a in self.alternatives)

    @property
    def cost_attribute(self) -> str | None:
        return next((v.name for v in self.attributes if v.role == "cost"), None)

    def used_coefficients(self) -> tuple[str, ...]:
        """Coefficient names in first-use order: utility terms, then nest scales."""
        names: dict[str, None] = {}
        for alt in self.alternative_ids:
            for term in self.utilities.get(alt, ()):
                names.setdefault(term.coefficient)
        for nest in self.nests:
            names.setdefault(nest.scale)
        return tuple(names)


@dataclass(frozen=True)
class Coefficients:
    """Estimates by name, with optional standard errors and covariance matrix."""

    names: tuple[str, ...]
    estimates: np.ndarray
    std_errors: np.ndarray | None = None
    covariance: np.ndarray | None = None
    """Square matrix ordered as ``names``."""

    def as_mapping(self) -> dict[str, float]:
        return {n: float(v) for n, v in zip(self.names, self.estimates, strict=True)}

    def index(self, name: str) -> int:
        return self.names.index(name)

    @classmethod
    def from_mapping(
        cls,
        estimates: Mapping[str, float],
        std_errors: Mapping[str, float] | None = None,
        covariance: tuple[Sequence[str], Any] | None = None,
    ) -> Coefficients:
        """Build from name->value maps; ``covariance`` is (row/column names, matrix)."""
        names = tuple(estimates)
        est = np.array([float(estimates[n]) for n in names], dtype=np.float64)
        se = None
        if std_errors is not None:
            se = np.array([float(std_errors.get(n, np.nan)) for n in names], dtype=np.float64)
        cov = None
        if covariance is not None:
            cov_names, matrix = covariance
            matrix = np.asarray(matrix, dtype=np.float64)
            if matrix.ndim != 2 or matrix.shape != (len(cov_names), len(cov_names)):
                raise SpecError(
                    [Problem("covariance", "must be a square matrix matching its names")]
                )
            missing = [n for n in names if n not in cov_names]
            extra = [n for n in cov_names if n not in estimates]
            problems = [
                Problem(f"covariance.{n}", "coefficient missing from covariance") for n in missing
            ]
            problems += [
                Problem(f"covariance.{n}", "not a coefficient of the model") for n in extra
            ]
            if problems:
                raise SpecError(problems)
            order = [list(cov_names).index(n) for n in names]
            cov = matrix[np.ix_(order, order)]
        return cls(names=names, estimates=est, std_errors=se, covariance=cov)


# ---------------------------------------------------------------------------------------
# Parsing plain dicts


def _require(obj: Mapping[str, Any], key: str, path: str, problems: list[Problem]) -> Any:
    if key not in obj:
        problems.append(Problem(f"{path}{key}", "is required"))
        return None
    return obj[key]


def _name(value: Any, path: str, problems: list[Problem]) -> str | None:
    if not isinstance(value, str) or not NAME_PATTERN.match(value):
        problems.append(
            Problem(
                path,
                "must be a name of 1-64 letters, digits, '_', '.' or '-', not starting with a digit",
            )
        )
        return None
    return value


def _optional_number(value: Any, path: str, problems: list[Problem]) -> float | None:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        problems.append(Problem(path, "must be a finite number"))
        return None
    return float(value)


def _check_keys(obj: Any, allowed: Iterable[str], path: str, problems: list[Problem]) -> bool:
    if not isinstance(obj, Mapping):
        problems.append(Problem(path or "$", "must be an object"))
        return False
    for key in obj:
        if key not in allowed:
            problems.append(Problem(f"{path}{'.' if path else ''}{key}", "unknown field"))
    return True


def _variables(items: Any, path: str, problems: list[Problem]) -> tuple[Variable, ...]:
    if items is None:
        return ()
    if not isinstance(items, list):
        problems.append(Problem(path, "must be a list"))
        return ()
    out = []
    for i, item in enumerate(items):
        p = f"{path}[{i}]"
        if not _check_keys(item, ("name", "unit", "low", "high", "role"), p, problems):
            continue
        name = _name(item.get("name"), f"{p}.name", problems)
        unit = item.get("unit")
        if unit is not None and not isinstance(unit, str):
            problems.append(Problem(f"{p}.unit", "must be a string"))
            unit = None
        low = _optional_number(item.get("low"), f"{p}.low", problems)
        high = _optional_number(item.get("high"), f"{p}.high", problems)
        if low is not None and high is not None and low > high:
            problems.append(Problem(f"{p}.low", "must not exceed high"))
        role = item.get("role")
        if role is not None and role not in ROLES:
            problems.append(Problem(f"{p}.role", f"must be one of {', '.join(ROLES)}"))
            role = None
        if name is not None:
            out.append(Variable(name=name, unit=unit, low=low, high=high, role=role))
    return tuple(out)


def spec_from_dict(data: Any) -> ModelSpec:
    """Parse and validate the structure of a plain JSON model specification.

    Checks everything that does not need the coefficient values; see
    :func:`validate_model` for the checks that do.  Raises :class:`SpecError`.
    """
    problems: list[Problem] = []
    top = (
        "name", "family", "alternatives", "attributes", "context", "utilities", "nests",
        "range_policy", "allow_scale_above_one",
    )  # fmt: skip
    if not _check_keys(data, top, "", problems):
        raise SpecError(problems)
    name = _name(_require(data, "name", "", problems), "name", problems)
    family = _require(data, "family", "", problems)
    if family is not None and family not in FAMILIES:
        problems.append(Problem("family", f"must be one of {', '.join(FAMILIES)}"))

    alternatives: list[Alternative] = []
    raw_alts = _require(data, "alternatives", "", problems)
    if raw_alts is not None and (not isinstance(raw_alts, list) or not raw_alts):
        problems.append(Problem("alternatives", "must be a non-empty list"))
        raw_alts = []
    for i, item in enumerate(raw_alts or []):
        p = f"alternatives[{i}]"
        if not _check_keys(item, ("id", "label", "outside"), p, problems):
            continue
        alt_id = _name(item.get("id"), f"{p}.id", problems)
        label = item.get("label")
        if label is not None and not isinstance(label, str):
            problems.append(Problem(f"{p}.label", "must be a string"))
        outside = item.get("outside", False)
        if not isinstance(outside, bool):
            problems.append(Problem(f"{p}.outside", "must be true or false"))
            outside = False
        if alt_id is not None:
            if alt_id in (a.id for a in alternatives):
                problems.append(Problem(f"{p}.id", f"duplicate alternative id {alt_id!r}"))
            alternatives.append(Alternative(id=alt_id, label=label, outside=outside))
    alt_ids = [a.id for a in alternatives]
    if family == "binary" and raw_alts and len(raw_alts) != 2:
        problems.append(Problem("alternatives", "a binary model has exactly two alternatives"))

    attributes = _variables(data.get("attributes"), "attributes", problems)
    context = _variables(data.get("context"), "context", problems)
    for kind, variables in (("attributes", attributes), ("context", context)):
        seen: set[str] = set()
        for i, v in enumerate(variables):
            if v.name in seen:
                problems.append(Problem(f"{kind}[{i}].name", f"duplicate name {v.name!r}"))
            seen.add(v.name)
    overlap = {v.name for v in attributes} & {v.name for v in context}
    for n in sorted(overlap):
        problems.append(Problem(f"context.{n}", "name is also an attribute"))
    if sum(v.role == "cost" for v in attributes) > 1:
        problems.append(Problem("attributes", "at most one attribute may have role 'cost'"))
    if any(v.role == "cost" for v in context):
        problems.append(Problem("context", "the cost role belongs to an attribute of alternatives"))
    attr_names = {v.name for v in attributes}
    ctx_names = {v.name for v in context}

    utilities: dict[str, tuple[Term, ...]] = {}
    raw_util = _require(data, "utilities", "", problems)
    if raw_util is not None and not isinstance(raw_util, Mapping):
        problems.append(Problem("utilities", "must be an object keyed by alternative id"))
        raw_util = {}
    for alt, terms in (raw_util or {}).items():
        p = f"utilities.{alt}"
        if alt not in alt_ids:
            problems.append(Problem(p, "not a declared alternative"))
            continue
        if not isinstance(terms, list):
            problems.append(Problem(p, "must be a list of terms"))
            continue
        parsed: list[Term] = []
        for i, item in enumerate(terms):
            tp = f"{p}[{i}]"
            if not _check_keys(
                item, ("coefficient", "attribute", "context", "transform"), tp, problems
            ):
                continue
            coef = _name(item.get("coefficient"), f"{tp}.coefficient", problems)
            attr = item.get("attribute")
            if attr is not None and attr not in attr_names:
                problems.append(Problem(f"{tp}.attribute", f"{attr!r} is not a declared attribute"))
            ctx = item.get("context")
            if ctx is not None and ctx not in ctx_names:
                problems.append(
                    Problem(f"{tp}.context", f"{ctx!r} is not a declared context variable")
                )
            transform = item.get("transform", "identity")
            if transform not in TRANSFORMS:
                problems.append(
                    Problem(f"{tp}.transform", f"must be one of {', '.join(TRANSFORMS)}")
                )
            elif transform != "identity" and attr is None:
                problems.append(Problem(f"{tp}.transform", "a transform needs an attribute"))
            if coef is not None:
                term = Term(coefficient=coef, attribute=attr, context=ctx, transform=transform)
                if term in parsed:
                    problems.append(Problem(tp, "duplicate term"))
                parsed.append(term)
        utilities[alt] = tuple(parsed)

    nests: list[Nest] = []
    raw_nests = data.get("nests") or []
    if family == "nested" and not raw_nests:
        problems.append(Problem("nests", "a nested model needs nests"))
    if family in ("binary", "multinomial") and raw_nests:
        problems.append(Problem("nests", f"a {family} model has no nests"))
    if not isinstance(raw_nests, list):
        problems.append(Problem("nests", "must be a list"))
        raw_nests = []
    placed: dict[str, str] = {}
    for i, item in enumerate(raw_nests):
        p = f"nests[{i}]"
        if not _check_keys(item, ("id", "scale", "alternatives"), p, problems):
            continue
        nest_id = _name(item.get("id"), f"{p}.id", problems)
        scale = _name(item.get("scale"), f"{p}.scale", problems)
        members = item.get("alternatives")
        if not isinstance(members, list) or not members:
            problems.append(Problem(f"{p}.alternatives", "must be a non-empty list"))
            members = []
        for j, alt in enumerate(members):
            if alt not in alt_ids:
                problems.append(
                    Problem(f"{p}.alternatives[{j}]", f"{alt!r} is not a declared alternative")
                )
            elif alt in placed:
                problems.append(
                    Problem(f"{p}.alternatives[{j}]", f"{alt!r} is already in nest {placed[alt]!r}")
                )
            else:
                placed[alt] = nest_id or ""
        if nest_id is not None and scale is not None:
            if nest_id in (n.id for n in nests):
                problems.append(Problem(f"{p}.id", f"duplicate nest id {nest_id!r}"))
            nests.append(Nest(id=nest_id, scale=scale, alternatives=tuple(members)))
    if family == "nested" and nests:
        for alt in alt_ids:
            if alt not in placed:
                problems.append(
                    Problem(
                        "nests",
                        f"alternative {alt!r} is in no nest (a degenerate nest of one is allowed)",
                    )
                )

    policy = data.get("range_policy", "warn")
    if policy not in RANGE_POLICIES:
        problems.append(Problem("range_policy", f"must be one of {', '.join(RANGE_POLICIES)}"))
    allow = data.get("allow_scale_above_one", False)
    if not isinstance(allow, bool):
        problems.append(Problem("allow_scale_above_one", "must be true or false"))

    if problems:
        raise SpecError(problems)
    return ModelSpec(
        name=name,  # type: ignore[arg-type]
        family=family,
        alternatives=tuple(alternatives),
        attributes=attributes,
        context=context,
        utilities={alt: utilities.get(alt, ()) for alt in alt_ids},
        nests=tuple(nests),
        range_policy=policy,
        allow_scale_above_one=allow,
    )


def spec_to_dict(spec: ModelSpec) -> dict[str, Any]:
    """The plain JSON form that :func:`spec_from_dict` reads (round-trips exactly)."""

    def variable(v: Variable) -> dict[str, Any]:
        d: dict[str, Any] = {"name": v.name}
        for key in ("unit", "low", "high", "role"):
            if getattr(v, key) is not None:
                d[key] = getattr(v, key)
        return d

    def term(t: Term) -> dict[str, Any]:
        d: dict[str, Any] = {"coefficient": t.coefficient}
        if t.attribute is not None:
            d["attribute"] = t.attribute
        if t.context is not None:
            d["context"] = t.context
        if t.transform != "identity":
            d["transform"] = t.transform
        return d

    out: dict[str, Any] = {
        "name": spec.name,
        "family": spec.family,
        "alternatives": [
            {
                "id": a.id,
                **({"label": a.label} if a.label is not None else {}),
                **({"outside": True} if a.outside else {}),
            }
            for a in spec.alternatives
        ],
        "attributes": [variable(v) for v in spec.attributes],
        "context": [variable(v) for v in spec.context],
        "utilities": {alt: [term(t) for t in terms] for alt, terms in spec.utilities.items()},
        "range_policy": spec.range_policy,
    }
    if spec.nests:
        out["nests"] = [
            {"id": n.id, "scale": n.scale, "alternatives": list(n.alternatives)} for n in spec.nests
        ]
    if spec.allow_scale_above_one:
        out["allow_scale_above_one"] = True
    return out


# ---------------------------------------------------------------------------------------
# Checks that need the numbers


def covariance_problems(cov: np.ndarray, k: int) -> list[Problem]:
    """Why ``cov`` is not a k x k covariance matrix: finite, symmetric and positive
    semi-definite (eigenvalues >= 0 up to rounding; common practice)."""
    if cov.shape != (k, k):
        return [Problem("covariance", f"must be {k} x {k}")]
    if not np.all(np.isfinite(cov)):
        return [Problem("covariance", "must be finite")]
    if not np.allclose(cov, cov.T, rtol=1e-10, atol=1e-14):
        return [Problem("covariance", "must be symmetric")]
    eig = np.linalg.eigvalsh(cov)
    tol = 1e-10 * max(1.0, float(np.max(np.abs(eig))))
    if eig.min() < -tol:
        return [
            Problem(
                "covariance",
                f"must be positive semi-definite (smallest eigenvalue {eig.min():.3g})",
            )
        ]
    return []


def validate_model(spec: ModelSpec, coefficients: Coefficients) -> None:
    """Refuse a spec/coefficient pair that cannot be scored (raises :class:`SpecError`).

    - every coefficient a term or nest uses is present, and every present one is used;
    - estimates are finite, standard errors finite and >= 0 where given;
    - nest scales lie in (0, 1] (Train 2009, sec. 4.2.1: the range consistent with utility
      maximisation for all data) unless ``allow_scale_above_one``, and are > 0 always;
    - a covariance matrix is finite, symmetric and positive semi-definite.
    """
    problems: list[Problem] = []
    used = spec.used_coefficients()
    present = dict(zip(coefficients.names, range(len(coefficients.names)), strict=True))
    if len(present) != len(coefficients.names):
        problems.append(Problem("coefficients", "duplicate coefficient names"))
    for name in used:
        if name not in present:
            problems.append(Problem(f"coefficients.{name}", "used by the model but missing"))
    for name in coefficients.names:
        if name not in used:
            problems.append(Problem(f"coefficients.{name}", "not used by any utility term or nest"))
    for i, name in enumerate(coefficients.names):
        if not math.isfinite(coefficients.estimates[i]):
            problems.append(Problem(f"coefficients.{name}.estimate", "must be finite"))
        if coefficients.std_errors is not None:
            se = coefficients.std_errors[i]
            if not (math.isnan(se) or (math.isfinite(se) and se >= 0)):
                problems.append(
                    Problem(f"coefficients.{name}.std_error", "must be finite and >= 0")
                )
    for i, nest in enumerate(spec.nests):
        if nest.scale not in present:
            continue
        lam = float(coefficients.estimates[present[nest.scale]])
        if not math.isfinite(lam):
            continue
        if lam <= 0:
            problems.append(Problem(f"nests[{i}].scale", f"scale {nest.scale} = {lam} must be > 0"))
        elif lam > 1 and not spec.allow_scale_above_one:
            problems.append(
                Problem(
                    f"nests[{i}].scale",
                    f"scale {nest.scale} = {lam} is above 1; set allow_scale_above_one to accept",
                )
            )
    if coefficients.covariance is not None:
        problems.extend(covariance_problems(coefficients.covariance, len(coefficients.names)))
    if problems:
        raise SpecError(problems)
