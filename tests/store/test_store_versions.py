"""Publishing and loading versions, on both backends (filesystem and S3 over HTTP)."""

from __future__ import annotations

import hashlib
import io
import json

import numpy as np
import pyarrow.parquet as pq
import pytest
from store_cases import FERRY_NAMES, FERRY_SPEC, ferry_coefficients, publish_ferry, raw_get, raw_put

from model_store import ArtifactError, NotFound, Store, StoreError, VersionExists
from service.choice.spec import SpecError, spec_from_dict, spec_to_dict

V1 = "models/ferry/versions/v1/"


def test_publish_then_load_round_trips(store: Store):
    manifest = publish_ferry(store, "v1", estimation={"sample_size": 1200, "notes": "pilot"})
    loaded = store.load_version("ferry", "v1")
    expected = ferry_coefficients()
    assert spec_to_dict(loaded.spec) == spec_to_dict(spec_from_dict(FERRY_SPEC))
    assert loaded.coefficients.names == FERRY_NAMES
    np.testing.assert_array_equal(loaded.coefficients.estimates, expected.estimates)
    np.testing.assert_array_equal(loaded.coefficients.std_errors, expected.std_errors)
    np.testing.assert_array_equal(loaded.coefficients.covariance, expected.covariance)
    assert loaded.manifest == manifest
    assert manifest["format_version"] == 1
    assert manifest["family"] == "multinomial"
    assert manifest["published_by"] == "tester"
    assert manifest["parent"] is None
    assert manifest["estimation"] == {"sample_size": 1200, "notes": "pilot"}


def test_manifest_checksums_are_sha256_of_the_stored_bytes(store: Store):
    publish_ferry(store, "v1")
    manifest = json.loads(raw_get(store, V1 + "manifest.json"))
    assert set(manifest["files"]) == {"coefficients.parquet", "covariance.parquet"}
    for name, digest in manifest["files"].items():
        # hashlib is the reference implementation of FIPS 180-4 sha256
        stored = manifest["stored_as"][name]
        assert hashlib.sha256(raw_get(store, V1 + stored)).hexdigest() == digest
        # the stored name carries the content: stem, first 16 hex digits, extension
        stem, ext = name.split(".")
        assert stored == f"{stem}.{digest[:16]}.{ext}"
    assert sorted(store.backend.list(V1)) == sorted(
        [V1 + "manifest.json", *(V1 + n for n in manifest["stored_as"].values())]
    )


def test_coefficient_file_is_plain_parquet(store: Store):
    publish_ferry(store, "v1")
    # read with pyarrow's Parquet reader directly: what an outside tool would see
    coef_key = store.stored_key("ferry", "v1", "coefficients.parquet")
    table = pq.read_table(io.BytesIO(raw_get(store, coef_key)))
    assert table.column_names == ["name", "estimate", "std_error"]
    assert table["name"].to_pylist() == list(FERRY_NAMES)
    assert table["std_error"].to_pylist()[-1] is None  # NaN std error stored as null
    cov_key = store.stored_key("ferry", "v1", "covariance.parquet")
    cov = pq.read_table(io.BytesIO(raw_get(store, cov_key)))
    assert cov.column_names == ["name", *FERRY_NAMES]


def test_listing_is_natural_and_only_of_published(store: Store):
    assert store.list_models() == []
    for v in ("v10", "v2", "v1"):
        publish_ferry(store, v)
    raw_put(store, "models/ferry/versions/v3/coefficients.parquet", b"leftover")
    raw_put(store, "models/orphan/versions/v1/coefficients.parquet", b"leftover")
    assert store.list_versions("ferry") == ["v1", "v2", "v10"]
    assert store.list_models() == ["ferry"]
    with pytest.raises(NotFound, match="version 'v3'"):
        store.load_version("ferry", "v3")
    with pytest.raises(NotFound, match="model 'nope'"):
        store.load_version("nope", "v1")


def test_existing_version_is_refused_and_unchanged(store: Store):
    publish_ferry(store, "v1")
    before = {k: raw_get(store, k) for k in store.backend.list(V1)}
    with pytest.raises(VersionExists, match="already published"):
        publish_ferry(store, "v1", shift=1.0)
    after = {k: raw_get(store, k) for k in store.backend.list(V1)}
    assert after == before
    assert store.load_version("ferry", "v1").coefficients.estimates[0] == pytest.approx(0.8)


class FailAfter:
    """A backend wrapper whose writes fail after ``n`` succeeded (a publish killed there)."""

    def __init__(self, inner, n: int):
        self.inner, self.left = inner, n
        self.uri = inner.uri

    def __getattr__(self, name):
        return getattr(self.inner, name)

    def _spend(self):
        if self.left == 0:
            raise KeyboardInterrupt("killed")
        self.left -= 1

    def put_new(self, key, data):
        self._spend()
        self.inner.put_new(key, data)


@pytest.mark.parametrize("writes_before_kill", [0, 1, 2])
def test_interrupted_publish_leaves_nothing_visible(store: Store, writes_before_kill: int):
    publish_ferry(store, "v1")
    dying = Store(FailAfter(store.backend, writes_before_kill))
    # a publish writes coefficients, covariance, then the manifest: 3 writes
    with pytest.raises(KeyboardInterrupt):
        publish_ferry(dying, "v2", shift=0.5)
    assert store.list_versions("ferry") == ["v1"]
    with pytest.raises(NotFound):
        store.load_version("ferry", "v2")
    # the leftovers never block a later publish of the same id, which then loads whole
    publish_ferry(store, "v2", shift=0.25)
    assert store.load_version("ferry", "v2").coefficients.estimates[0] == pytest.approx(1.05)
    assert store.list_versions("ferry") == ["v1", "v2"]


def test_checksum_mismatch_refuses_the_version(store: Store):
    publish_ferry(store, "v1")
    key = store.stored_key("ferry", "v1", "coefficients.parquet")
    data = bytearray(raw_get(store, key))
    data[len(data) // 2] ^= 0x01
    raw_put(store, key, bytes(data))
    with pytest.raises(ArtifactError, match=r"coefficients\.parquet: checksum mismatch") as info:
        store.load_version("ferry", "v1")
    assert info.value.file == "coefficients.parquet"


def test_truncated_file_refuses_the_version(store: Store):
    publish_ferry(store, "v1")
    key = store.stored_key("ferry", "v1", "covariance.parquet")
    data = raw_get(store, key)
    raw_put(store, key, data[: len(data) // 3])
    with pytest.raises(ArtifactError, match=r"covariance\.parquet: checksum mismatch"):
        store.load_version("ferry", "v1")


def test_truncated_manifest_refuses_the_version(store: Store):
    publish_ferry(store, "v1")
    raw_put(store, V1 + "manifest.json", raw_get(store, V1 + "manifest.json")[:40])
    with pytest.raises(ArtifactError, match=r"manifest\.json: not valid JSON"):
        store.load_version("ferry", "v1")


def test_missing_file_refuses_the_version(store: Store):
    publish_ferry(store, "v1")
    manifest = json.loads(raw_get(store, V1 + "manifest.json"))
    manifest["version"] = "v9"
    raw_put(store, "models/ferry/versions/v9/manifest.json", json.dumps(manifest).encode())
    with pytest.raises(ArtifactError, match=r"v9/coefficients\.parquet: missing"):
        store.load_version("ferry", "v9")


def test_unknown_format_version_is_refused(store: Store):
    publish_ferry(store, "v1")
    manifest = json.loads(raw_get(store, V1 + "manifest.json"))
    manifest["format_version"] = 2
    raw_put(store, V1 + "manifest.json", json.dumps(manifest).encode())
    with pytest.raises(ArtifactError, match=r"manifest\.json: unknown format_version 2"):
        store.load_version("ferry", "v1")


def test_manifest_moved_to_another_version_is_refused(store: Store):
    publish_ferry(store, "v1")
    raw_put(store, "models/ferry/versions/v5/manifest.json", raw_get(store, V1 + "manifest.json"))
    with pytest.raises(ArtifactError, match="different model or version"):
        store.load_version("ferry", "v5")


def test_invalid_model_is_refused_before_anything_is_written(store: Store, ferry_spec):
    coefficients = ferry_coefficients()
    bad = coefficients.estimates.copy()
    bad[1] = np.nan
    nan_coefs = type(coefficients)(names=coefficients.names, estimates=bad)
    with pytest.raises(SpecError, match=r"coefficients\.b_fare\.estimate: must be finite"):
        store.publish("ferry", "v1", ferry_spec, nan_coefs, published_by="t")
    assert store.backend.list("models/") == []


def test_names_and_spec_name_are_checked(store: Store, ferry_spec):
    with pytest.raises(StoreError, match=r"version: '\.\./x' is not a valid name"):
        store.publish("ferry", "../x", ferry_spec, ferry_coefficients(), published_by="t")
    with pytest.raises(StoreError, match="the spec is named 'ferry', not 'boat'"):
        store.publish("boat", "v1", ferry_spec, ferry_coefficients(), published_by="t")
    with pytest.raises(NotFound, match="parent"):
        publish_ferry(store, "v1", parent="v0")
    with pytest.raises(SpecError, match=r"estimation\.sample_size"):
        publish_ferry(store, "v1", estimation={"sample_size": -3})


def test_a_coefficient_called_name_round_trips(store: Store):
    spec = spec_from_dict(
        {
            "name": "toll",
            "family": "binary",
            "alternatives": [{"id": "pay"}, {"id": "detour"}],
            "attributes": [{"name": "fee", "role": "cost"}],
            "utilities": {
                "pay": [{"coefficient": "name"}, {"coefficient": "b_fee", "attribute": "fee"}],
                "detour": [{"coefficient": "b_fee", "attribute": "fee"}],
            },
        }
    )
    cov = np.array([[0.01, 0.001], [0.001, 0.02]])
    coefficients = type(ferry_coefficients())(
        names=("name", "b_fee"), estimates=np.array([0.1, -0.2]), covariance=cov
    )
    store.publish("toll", "v1", spec, coefficients, published_by="t")
    loaded = store.load_version("toll", "v1")
    np.testing.assert_array_equal(loaded.coefficients.covariance, cov)
    assert loaded.coefficients.names == ("name", "b_fee")
