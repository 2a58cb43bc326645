"""Artifact format version 1: the manifest and the Parquet files of one model version.

A version lives under ``models/{model}/versions/{version}/``:

- ``coefficients.parquet``: columns ``name`` (string), ``estimate`` (float64),
  ``std_error`` (float64, null where not estimated);
- ``covariance.parquet`` (optional): ``name`` (string) plus one float64 column per
  coefficient, rows and columns in the same order;
- ``manifest.json``, written last: see :func:`build_manifest`. It carries the sha256 of every
  other file, so a version is either whole and verified or refused.

The data files are stored under names that carry their content (:func:`stored_name`), listed
in the manifest's ``stored_as``; a manifest without ``stored_as`` has them at the plain names.

Everything here is pure: bytes in, values out. See docs/artifact-format.md.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import io
import json
import math
import re
from collections.abc import Mapping
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from service.choice.spec import Coefficients, ModelSpec, Problem, SpecError

FORMAT_VERSION = 1
MANIFEST = "manifest.json"
COEFFICIENTS = "coefficients.parquet"
COVARIANCE = "covariance.parquet"
_HEX64 = re.compile(r"[0-9a-f]{64}")
ESTIMATION_FIELDS = {"sample_size": int, "log_likelihood": float, "date": str, "notes": str}


class FileFormatError(ValueError):
    """A file of an artifact that does not decode; ``file`` names it."""

    def __init__(self, file: str, message: str):
        self.file = file
        super().__init__(message)


def sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def stored_name(name: str, digest: str) -> str:
    """The name a data file is stored under: ``coefficients.parquet`` with sha256 ``S`` is
    ``coefficients.{S[:16]}.parquet``, so two different contents never share a key."""
    stem, dot, ext = name.partition(".")
    return f"{stem}.{digest[:16]}{dot}{ext}"


def stored_names(manifest: Mapping[str, Any]) -> dict[str, str]:
    """File name -> the name it is stored under (the plain name when ``stored_as`` is absent)."""
    stored = manifest.get("stored_as") or {}
    return {name: stored.get(name, name) for name in manifest["files"]}


def now_iso() -> str:
    return dt.datetime.now(dt.UTC).isoformat(timespec="seconds").replace("+00:00", "Z")


def check_estimation(data: Any, path: str = "estimation") -> dict[str, Any]:
    """Validate the optional estimation metadata (sample size, log-likelihood, date, notes)."""
    if data is None:
        return {}
    if not isinstance(data, Mapping):
        raise SpecError([Problem(path, "must be an object")])
    problems = []
    for key, value in data.items():
        kind = ESTIMATION_FIELDS.get(key)
        if kind is None:
            problems.append(Problem(f"{path}.{key}", "unknown field"))
        elif value is None:
            continue
        elif kind is int and (isinstance(value, bool) or not isinstance(value, int) or value < 0):
            problems.append(Problem(f"{path}.{key}", "must be a non-negative integer"))
        elif kind is float and (
            isinstance(value, bool)
            or not isinstance(value, int | float)
            or not math.isfinite(value)
        ):
            problems.append(Problem(f"{path}.{key}", "must be a finite number"))
        elif kind is str and not isinstance(value, str):
            problems.append(Problem(f"{path}.{key}", "must be a string"))
    if problems:
        raise SpecError(problems)
    return {k: v for k, v in data.items() if v is not None}


# ---------------------------------------------------------------------------------------
# Parquet files


def _parquet_bytes(table: pa.Table) -> bytes:
    sink = io.BytesIO()
    pq.write_table(table, sink, compression="zstd")
    return sink.getvalue()


def _read_parquet(file: str, data: bytes) -> pa.Table:
    try:
        return pq.ParquetFile(pa.BufferReader(data)).read()
    except (pa.ArrowException, OSError, ValueError) as exc:
        raise FileFormatError(file, f"not a readable Parquet file ({exc})") from None


def coefficients_bytes(coefficients: Coefficients) -> bytes:
    se = coefficients.std_errors
    se_array = (
        pa.nulls(len(coefficients.names), pa.float64())
        if se is None
        else pa.array(se, pa.float64(), mask=np.isnan(se))
    )
    table = pa.table(
        {
            "name": pa.array(coefficients.names, pa.string()),
            "estimate": pa.array(coefficients.estimates, pa.float64()),
            "std_error": se_array,
        }
    )
    return _parquet_bytes(table)


def covariance_bytes(coefficients: Coefficients) -> bytes:
    assert coefficients.covariance is not None
    cov = coefficients.covariance
    arrays = [pa.array(coefficients.names, pa.string())]
    arrays += [pa.array(cov[:, j], pa.float64()) for j in range(len(coefficients.names))]
    # positional: a coefficient may itself be called "name"
    return _parquet_bytes(pa.Table.from_arrays(arrays, names=["name", *coefficients.names]))


def read_coefficients(data: bytes) -> tuple[tuple[str, ...], np.ndarray, np.ndarray | None]:
    """Decode ``coefficients.parquet`` into (names, estimates, std errors or None)."""
    table = _read_parquet(COEFFICIENTS, data)
    if table.column_names != ["name", "estimate", "std_error"]:
        raise FileFormatError(
            COEFFICIENTS, f"columns must be name, estimate, std_error, not {table.column_names}"
        )
    if not pa.types.is_string(table.schema.field("name").type) or table["name"].null_count:
        raise FileFormatError(COEFFICIENTS, "name must be a non-null string column")
    for col in ("estimate", "std_error"):
        if not pa.types.is_float64(table.schema.field(col).type):
            raise FileFormatError(COEFFICIENTS, f"{col} must be float64")
    if table["estimate"].null_count:
        raise FileFormatError(COEFFICIENTS, "estimate must not be null")
    names = tuple(table["name"].to_pylist())
    est = table["estimate"].to_numpy()
    se_col = table["std_error"]
    se = None if se_col.null_count == len(se_col) else se_col.to_numpy(zero_copy_only=False)
    return names, est.astype(np.float64), None if se is None else se.astype(np.float64)


def read_covariance(data: bytes, names: tuple[str, ...]) -> np.ndarray:
    """Decode ``covariance.parquet``; rows and columns must be ``names`` in order."""
    table = _read_parquet(COVARIANCE, data)
    if table.column_names != ["name", *names]:
        raise FileFormatError(COVARIANCE, "columns must be name followed by every coefficient")
    if tuple(table.column(0).to_pylist()) != names:
        raise FileFormatError(COVARIANCE, "rows must be the coefficients in order")
    try:
        columns = [table.column(j + 1) for j in range(len(names))]
        if any(not pa.types.is_float64(c.type) or c.null_count for c in columns):
            raise ValueError("every value must be a non-null float64")
        matrix = np.column_stack([c.to_numpy().astype(np.float64) for c in columns])
    except (pa.ArrowException, ValueError, TypeError) as exc:
        raise FileFormatError(COVARIANCE, f"values must be float64 ({exc})") from None
    return matrix.reshape(len(names), len(names))


# ---------------------------------------------------------------------------------------
# The manifest


def build_manifest(
    *,
    model: str,
    version: str,
    spec: ModelSpec,
    spec_dict: dict[str, Any],
    files: Mapping[str, str],
    published_by: str,
    stored_as: Mapping[str, str] | None = None,
    estimation: Mapping[str, Any] | None = None,
    parent: str | None = None,
    calibration: Mapping[str, Any] | None = None,
    created_at: str | None = None,
) -> dict[str, Any]:
    """The manifest of format version 1.

    ``files`` maps file name -> sha256 hex; ``stored_as`` (optional) maps file name -> the name
    it is stored under, :func:`stored_name` of its digest.
    """
    manifest: dict[str, Any] = {
        "format_version": FORMAT_VERSION,
        "model": model,
        "version": version,
        "family": spec.family,
        "created_at": created_at or now_iso(),
        "published_by": published_by,
        "parent": parent,
        "estimation": dict(estimation or {}),
        "spec": spec_dict,
        "files": dict(files),
    }
    if stored_as is not None:
        manifest["stored_as"] = dict(stored_as)
    if calibration is not None:
        manifest["calibration"] = dict(calibration)
    return manifest


def manifest_bytes(manifest: Mapping[str, Any]) -> bytes:
    return (json.dumps(manifest, indent=2, sort_keys=False, allow_nan=False) + "\n").encode()


def parse_manifest(data: bytes) -> dict[str, Any]:
    """Decode and check the envelope of a manifest (not yet the spec or the files)."""
    try:
        manifest = json.loads(data)
    except (ValueError, UnicodeDecodeError) as exc:
        raise FileFormatError(MANIFEST, f"not valid JSON ({exc})") from None
    if not isinstance(manifest, dict):
        raise FileFormatError(MANIFEST, "must be a JSON object")
    fmt = manifest.get("format_version")
    if fmt != FORMAT_VERSION:
        raise FileFormatError(
            MANIFEST, f"unknown format_version {fmt!r} (this release reads {FORMAT_VERSION})"
        )
    for key, kind in (
        ("model", str),
        ("version", str),
        ("family", str),
        ("created_at", str),
        ("published_by", str),
        ("spec", dict),
        ("files", dict),
    ):
        if not isinstance(manifest.get(key), kind):
            raise FileFormatError(MANIFEST, f"field {key!r} missing or of the wrong type")
    files = manifest["files"]
    if COEFFICIENTS not in files:
        raise FileFormatError(MANIFEST, f"files must list {COEFFICIENTS}")
    for name, digest in files.items():
        if name not in (COEFFICIENTS, COVARIANCE):
            raise FileFormatError(MANIFEST, f"files lists an unknown file {name!r}")
        if not isinstance(digest, str) or not _HEX64.fullmatch(digest):
            raise FileFormatError(MANIFEST, f"files.{name} must be a sha256 hex digest")
    stored = manifest.get("stored_as")
    if stored is not None:
        if not isinstance(stored, dict) or set(stored) != set(files):
            raise FileFormatError(MANIFEST, "stored_as must name exactly the files listed")
        for name, digest in files.items():
            if stored[name] != stored_name(name, digest):
                raise FileFormatError(
                    MANIFEST, f"stored_as.{name} must be {stored_name(name, digest)!r}"
                )
    return manifest
