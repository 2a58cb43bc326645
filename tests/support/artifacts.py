"""Published, corrupt, partial and hostile versions written into a store, for fault tests.

The good model is invented: islanders choosing between a ``ferry``, a ``plane`` and staying
home (``stay``, the outside option) for a weekend trip; the numbers are made up.  Hostile
versions are written key by key behind the store's back (:func:`write_behind`, as a broken
or malicious publisher would), bypassing :meth:`model_store.Store.publish` and its checks.
"""

from __future__ import annotations

import io
import json
import pickle
from collections.abc import Mapping
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq

from model_store import Store
from model_store.artifact import (
    COEFFICIENTS,
    MANIFEST,
    build_manifest,
    coefficients_bytes,
    manifest_bytes,
    sha256,
)
from model_store.backends.filesystem import FileBackend
from model_store.backends.s3 import S3Backend
from model_store.routing import RoutingState, encode, record_key
from service.choice.spec import Coefficients, ModelSpec, spec_from_dict, spec_to_dict

MODEL = "weekend"


def spec() -> ModelSpec:
    return spec_from_dict(
        {
            "name": MODEL,
            "family": "multinomial",
            "alternatives": [{"id": "ferry"}, {"id": "plane"}, {"id": "stay", "outside": True}],
            "attributes": [
                {"name": "fare", "unit": "EUR", "low": 5.0, "high": 400.0, "role": "cost"},
                {"name": "hours", "unit": "h", "low": 0.5, "high": 12.0},
            ],
            "context": [{"name": "party", "unit": "people", "low": 1.0, "high": 8.0}],
            "utilities": {
                "ferry": [
                    {"coefficient": "asc_ferry"},
                    {"coefficient": "b_fare", "attribute": "fare"},
                    {"coefficient": "b_hours", "attribute": "hours", "transform": "log"},
                ],
                "plane": [
                    {"coefficient": "asc_plane"},
                    {"coefficient": "b_fare", "attribute": "fare"},
                    {"coefficient": "b_hours", "attribute": "hours", "transform": "log"},
                    {"coefficient": "b_party_plane", "context": "party"},
                ],
                "stay": [],
            },
        }
    )


def coefficients(shift: float = 0.0) -> Coefficients:
    """Made-up estimates; ``shift`` moves the fare coefficient (a re-estimate)."""
    return Coefficients.from_mapping(
        {
            "asc_ferry": 1.1,
            "asc_plane": 0.4,
            "b_fare": -0.012 - shift,
            "b_hours": -0.7,
            "b_party_plane": -0.15,
        }
    )


def publish_good(store: Store, version: str, shift: float = 0.0) -> None:
    store.backend.ensure()
    store.publish(MODEL, version, spec(), coefficients(shift), published_by="reliability-tests")


def _prefix(model: str, version: str) -> str:
    return f"models/{model}/versions/{version}/"


def write_behind(store: Store, key: str, data: bytes) -> None:
    """Write or replace ``key`` behind the store's back, as a broken or hostile writer could
    (the store itself never overwrites): a plain file under the filesystem root, or a plain
    ``PutObject`` to the S3 server."""
    backend = store.backend
    if isinstance(backend, FileBackend):
        path = backend.root / key
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(data)
    elif isinstance(backend, S3Backend):
        name = f"{backend.prefix}/{key}" if backend.prefix else key
        backend.client.put_object(Bucket=backend.bucket, Key=name, Body=data)
    else:
        raise TypeError(f"write_behind: no direct writer for {type(backend).__name__}")


def write_version(
    store: Store,
    version: str,
    files: Mapping[str, bytes],
    *,
    listed: Mapping[str, bytes] | None = None,
    manifest: bool = True,
    manifest_extra: Mapping[str, Any] | None = None,
) -> None:
    """Write ``files`` under the version's prefix and (unless ``manifest`` is False, a partial
    publish) a manifest whose ``files`` lists the sha256 of ``listed`` (default: ``files``)."""
    prefix = _prefix(MODEL, version)
    for name, data in files.items():
        write_behind(store, prefix + name, data)
    if not manifest:
        return
    digests = {n: sha256(d) for n, d in (files if listed is None else listed).items()}
    body = build_manifest(
        model=MODEL,
        version=version,
        spec=spec(),
        spec_dict=spec_to_dict(spec()),
        files=digests,
        published_by="someone-else",
    )
    body.update(manifest_extra or {})
    write_behind(store, prefix + MANIFEST, manifest_bytes(body))


def good_coefficients_bytes(shift: float = 0.0) -> bytes:
    return coefficients_bytes(coefficients(shift))


class _Payload:
    """Unpickling this creates ``marker`` (a directory): proof that something unpickled."""

    def __init__(self, marker: str):
        self.marker = marker

    def __reduce__(self):
        import os

        return (os.mkdir, (self.marker,))


def pickle_payload(marker: str) -> bytes:
    return pickle.dumps(_Payload(marker))


def parquet_with_pickled_extension(marker: str) -> bytes:
    """A Parquet coefficients file whose ``estimate`` column claims the pickle-based Arrow
    extension type ``arrow.py_extension_type`` with a payload (a known deserialisation
    attack on Arrow readers; pyarrow refuses to unpickle it unless told to)."""
    base = pq.read_table(pa.BufferReader(good_coefficients_bytes()))
    field = base.schema.field("estimate").with_metadata(
        {
            b"ARROW:extension:name": b"arrow.py_extension_type",
            b"ARROW:extension:metadata": pickle_payload(marker),
        }
    )
    schema = base.schema.set(base.schema.get_field_index("estimate"), field)
    table = pa.Table.from_arrays(base.columns, schema=schema)
    sink = io.BytesIO()
    pq.write_table(table, sink, store_schema=True)
    return sink.getvalue()


def force_routing(
    store: Store, live: Mapping[str, float], reason: str = "forced", model: str = MODEL
) -> int:
    """Write the next routing record directly (no validation): what a buggy or hostile writer
    could leave in the store.  Returns its generation."""
    generation = store.routing_generation(model) + 1
    state = RoutingState(
        model=model,
        generation=generation,
        live=dict(live),
        previous_generation=generation - 1,
        action="route",
        changed_by="someone-else",
        changed_at="2026-01-01T00:00:00Z",
        reason=reason,
    )
    write_behind(store, record_key(model, generation), encode(state))
    return generation


def manifest_of(store: Store, version: str) -> dict[str, Any]:
    return json.loads(store.backend.get(_prefix(MODEL, version) + MANIFEST))


COEFFICIENTS_FILE = COEFFICIENTS


def plant_version(
    store: Store, model: str, source: str, target: str, *, data: bytes, manifest: bool = True
) -> None:
    """Write ``target`` as a copy of ``source`` whose coefficients file holds ``data``.

    The manifest (renamed to ``target``) keeps ``source``'s checksums, so ``data`` other than
    the original bytes makes a corrupt version; ``manifest=False`` leaves only the data file,
    as an interrupted publish would.  Covariance files are copied unchanged.
    """
    src, dst = _prefix(model, source), _prefix(model, target)
    body = json.loads(store.backend.get(src + MANIFEST))
    body.pop("stored_as", None)  # the copy keeps its files at the plain names
    for name in body["files"]:
        write_behind(
            store,
            dst + name,
            data
            if name == COEFFICIENTS
            else store.backend.get(store.stored_key(model, source, name)),
        )
    if manifest:
        body["version"] = target
        write_behind(store, dst + MANIFEST, manifest_bytes(body))


def original_coefficients(store: Store, model: str, version: str) -> bytes:
    return store.backend.get(store.stored_key(model, version, COEFFICIENTS))
