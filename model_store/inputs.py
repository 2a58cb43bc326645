"""Reading what an estimation run exports: a plain spec (JSON), coefficients (CSV or JSON)
and an optional covariance matrix (CSV or JSON). Every refusal is a
:class:`~service.choice.spec.SpecError` whose problems name the file and the field.

- SPEC.json: the object :func:`~service.choice.spec.spec_from_dict` reads, plus an optional
  ``"estimation"`` object (sample_size, log_likelihood, date, notes).
- Coefficients CSV: header ``name,estimate`` or ``name,estimate,std_error``; JSON: either
  ``{"name": estimate, ...}`` or ``[{"name": ..., "estimate": ..., "std_error": ...}, ...]``.
- Covariance CSV: header ``name,<coef>,<coef>...`` then one row per coefficient;
  JSON: ``{"names": [...], "matrix": [[...], ...]}``.
"""

from __future__ import annotations

import csv
import io
import json
import math
from pathlib import Path
from typing import Any

import numpy as np

from model_store.artifact import check_estimation
from service.choice.spec import (
    Coefficients,
    ModelSpec,
    Problem,
    SpecError,
    covariance_problems,
    spec_from_dict,
)


def _read_text(path: str | Path, what: str) -> str:
    try:
        return Path(path).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise SpecError([Problem(what, f"file {str(path)!r} not found")]) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise SpecError([Problem(what, f"cannot read {str(path)!r}: {exc}")]) from None


def _load_json(text: str, what: str) -> Any:
    try:
        return json.loads(text)
    except ValueError as exc:
        raise SpecError([Problem(what, f"not valid JSON: {exc}")]) from None


def _is_json(path: str | Path, text: str) -> bool:
    suffix = Path(path).suffix.lower()
    return suffix == ".json" or (suffix != ".csv" and text.lstrip()[:1] in ("{", "["))


def read_spec(path: str | Path) -> tuple[ModelSpec, dict[str, Any]]:
    """The spec and its estimation metadata from a SPEC.json file."""
    data = _load_json(_read_text(path, "spec"), "spec")
    if isinstance(data, dict):
        data = dict(data)
        estimation = check_estimation(data.pop("estimation", None))
    else:
        estimation = {}
    return spec_from_dict(data), estimation


def _number(value: Any, path: str, problems: list[Problem], *, optional: bool = False) -> float:
    """A finite float; text is parsed as a decimal number."""
    if optional and (value is None or (isinstance(value, str) and not value.strip())):
        return math.nan
    if isinstance(value, bool):
        problems.append(Problem(path, "must be a number"))
        return math.nan
    try:
        number = float(value)
    except (TypeError, ValueError):
        problems.append(Problem(path, f"must be a number, not {value!r}"))
        return math.nan
    if not math.isfinite(number):
        problems.append(Problem(path, f"must be finite, not {value!r}"))
    return number


def read_coefficients(path: str | Path) -> tuple[list[str], np.ndarray, np.ndarray | None]:
    """(names, estimates, std errors or None) from a CSV or JSON file."""
    text = _read_text(path, "coefficients")
    problems: list[Problem] = []
    rows: list[tuple[str, Any, Any, str]] = []  # name, estimate, std_error, path
    if _is_json(path, text):
        data = _load_json(text, "coefficients")
        if isinstance(data, dict):
            rows = [(k, v, None, f"coefficients.{k}") for k, v in data.items()]
        elif isinstance(data, list):
            for i, item in enumerate(data):
                p = f"coefficients[{i}]"
                if not isinstance(item, dict):
                    problems.append(Problem(p, "must be an object with name and estimate"))
                    continue
                for key in item:
                    if key not in ("name", "estimate", "std_error"):
                        problems.append(Problem(f"{p}.{key}", "unknown field"))
                if "estimate" not in item:
                    problems.append(Problem(f"{p}.estimate", "is required"))
                rows.append((item.get("name"), item.get("estimate"), item.get("std_error"), p))
        else:
            problems.append(Problem("coefficients", "must be an object or a list of objects"))
    else:
        reader = csv.reader(io.StringIO(text))
        header = [h.strip() for h in next(reader, [])]
        if header not in (["name", "estimate"], ["name", "estimate", "std_error"]):
            raise SpecError(
                [
                    Problem(
                        "coefficients.header",
                        f"must be name,estimate[,std_error], not {','.join(header) or 'empty'}",
                    )
                ]
            )
        for line, row in enumerate(reader, start=2):
            if not row or all(not c.strip() for c in row):
                continue
            p = f"coefficients[line {line}]"
            if len(row) != len(header):
                problems.append(Problem(p, f"has {len(row)} fields, the header {len(header)}"))
                continue
            se = row[2] if len(row) > 2 else None
            rows.append((row[0].strip(), row[1].strip(), se, p))
    names: list[str] = []
    estimates: list[float] = []
    std_errors: list[float] = []
    for name, est, se, p in rows:
        if not isinstance(name, str) or not name:
            problems.append(Problem(f"{p}.name", "must be a non-empty string"))
            continue
        if name in names:
            problems.append(Problem(f"{p}.name", f"duplicate coefficient {name!r}"))
            continue
        where = p if p.endswith(name) else f"{p}.{name}"
        names.append(name)
        estimates.append(_number(est, f"{where}.estimate", problems))
        std_errors.append(_number(se, f"{where}.std_error", problems, optional=True))
    if not rows and not problems:
        problems.append(Problem("coefficients", "no coefficients given"))
    if problems:
        raise SpecError(problems)
    se_array = np.array(std_errors, dtype=np.float64)
    return (
        names,
        np.array(estimates, dtype=np.float64),
        None if np.all(np.isnan(se_array)) else se_array,
    )


def read_covariance(path: str | Path) -> tuple[list[str], np.ndarray]:
    """(names, square matrix) from a CSV or JSON file."""
    text = _read_text(path, "covariance")
    problems: list[Problem] = []
    if _is_json(path, text):
        data = _load_json(text, "covariance")
        if not isinstance(data, dict) or set(data) != {"names", "matrix"}:
            raise SpecError([Problem("covariance", 'must be {"names": [...], "matrix": [[...]]}')])
        names, raw = data["names"], data["matrix"]
        if not isinstance(names, list) or not all(isinstance(n, str) for n in names):
            raise SpecError([Problem("covariance.names", "must be a list of strings")])
        if not isinstance(raw, list) or not all(isinstance(r, list) for r in raw):
            raise SpecError([Problem("covariance.matrix", "must be a list of rows")])
        labelled = [
            (n, r, f"covariance.matrix[{i}]")
            for i, (n, r) in enumerate(zip(names, raw, strict=False))
        ]
        if len(raw) != len(names):
            problems.append(Problem("covariance.matrix", f"needs {len(names)} rows"))
    else:
        reader = csv.reader(io.StringIO(text))
        header = [h.strip() for h in next(reader, [])]
        if len(header) < 2 or header[0] != "name":
            raise SpecError([Problem("covariance.header", "must be name,<coefficient>,...")])
        names = header[1:]
        body = [r for r in reader if r and any(c.strip() for c in r)]
        labelled = [(r[0].strip(), r[1:], f"covariance[line {i}]") for i, r in enumerate(body, 2)]
        if [n for n, _, _ in labelled] != names:
            problems.append(
                Problem("covariance.name", "rows must list the coefficients in the header's order")
            )
    if len(set(names)) != len(names):
        problems.append(Problem("covariance.names", "duplicate coefficient names"))
    k = len(names)
    matrix = np.full((k, k), np.nan)
    for i, (_, values, p) in enumerate(labelled[:k]):
        if len(values) != k:
            problems.append(Problem(p, f"needs {k} values, has {len(values)}"))
            continue
        for j, value in enumerate(values):
            matrix[i, j] = _number(value, f"{p}.{names[j]}", problems)
    if problems:
        raise SpecError(problems)
    return names, matrix


def read_model_inputs(
    spec_path: str | Path,
    coefficients_path: str | Path,
    covariance_path: str | Path | None = None,
) -> tuple[ModelSpec, Coefficients, dict[str, Any]]:
    """Read the three inputs and assemble :class:`Coefficients` (not yet validated against the
    spec: call :func:`~service.choice.spec.validate_model`)."""
    problems: list[Problem] = []
    read: dict[str, Any] = {}
    readers = {
        "spec": (read_spec, spec_path),
        "coefficients": (read_coefficients, coefficients_path),
    }
    if covariance_path is not None:
        readers["covariance"] = (read_covariance, covariance_path)
    for key, (reader, path) in readers.items():  # every file read, every problem listed
        try:
            read[key] = reader(path)
        except SpecError as exc:
            problems.extend(exc.problems)
    if problems:
        if "covariance" in read and "coefficients" not in read:
            cov_names, matrix = read["covariance"]
            problems.extend(covariance_problems(matrix, len(cov_names)))
        raise SpecError(problems)
    spec, estimation = read["spec"]
    names, est, se = read["coefficients"]
    covariance = read.get("covariance")
    coefficients = Coefficients.from_mapping(
        dict(zip(names, est, strict=True)),
        None if se is None else dict(zip(names, se, strict=True)),
        covariance,
    )
    return spec, coefficients, estimation
