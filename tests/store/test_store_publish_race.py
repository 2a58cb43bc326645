"""Two publishes of the same new version id with different contents, interleaved write by write,
on both backends: exactly one wins, the other gets VersionExists, and the version loads,
verified, with the winner's coefficients (nothing published is ever lost or overwritten)."""

from __future__ import annotations

import hashlib
import json
import threading

import numpy as np
import pytest
from store_cases import FERRY_SPEC, ferry_coefficients, raw_get, raw_put

from model_store import ArtifactError, NotFound, Store, StoreError, VersionExists, open_store
from model_store.artifact import build_manifest, coefficients_bytes, manifest_bytes
from model_store.backends.base import KeyExists
from service.choice.spec import spec_from_dict, spec_to_dict

V1 = "models/ferry/versions/v1/"
WRITES = 3  # a publish writes coefficients, covariance, then the manifest
TIMEOUT = 30.0  # every wait below is bounded


class Gate:
    """A backend wrapper that stops its publisher just before its ``pause_before``-th write
    (0-based) until :meth:`resume`; ``None`` never stops."""

    def __init__(self, inner, pause_before: int | None):
        self.inner, self.pause_before, self.writes = inner, pause_before, 0
        self.uri = inner.uri
        self.paused, self.resumed = threading.Event(), threading.Event()

    def __getattr__(self, name):
        return getattr(self.inner, name)

    def _count(self) -> None:
        if self.writes == self.pause_before:
            self.paused.set()
            assert self.resumed.wait(TIMEOUT), "never resumed"
        self.writes += 1

    def put_new(self, key, data):
        self._count()
        self.inner.put_new(key, data)

    def resume(self) -> None:
        self.resumed.set()


class Publisher:
    """One publish of ferry v1 in its own thread, through a :class:`Gate`."""

    def __init__(self, store: Store, who: str, shift: float, pause_before: int | None):
        self.who, self.coefficients = who, ferry_coefficients(shift)
        self.gate = Gate(store.backend, pause_before)
        self.outcome: str | BaseException | None = None
        self.thread = threading.Thread(target=self._run, args=(Store(self.gate),), daemon=True)

    def _run(self, store: Store) -> None:
        spec = spec_from_dict(FERRY_SPEC)
        try:
            store.publish("ferry", "v1", spec, self.coefficients, published_by=self.who)
            self.outcome = "won"
        except VersionExists:
            self.outcome = "exists"
        except BaseException as exc:  # reported by the test, never swallowed
            self.outcome = exc
        finally:
            self.gate.paused.set()  # a publisher that finished never pauses again

    def start_until_paused(self) -> None:
        self.thread.start()
        assert self.gate.paused.wait(TIMEOUT), f"{self.who} never reached its pause"

    def finish(self) -> None:
        self.gate.resume()
        self.thread.join(TIMEOUT)
        assert not self.thread.is_alive(), f"{self.who} did not finish"


def check_winner(store: Store, winner: Publisher, loser: Publisher) -> None:
    assert (winner.outcome, loser.outcome) == ("won", "exists"), (winner.outcome, loser.outcome)
    assert store.list_versions("ferry") == ["v1"]
    loaded = store.load_version("ferry", "v1")  # checksums verified
    assert loaded.manifest["published_by"] == winner.who
    np.testing.assert_array_equal(loaded.coefficients.estimates, winner.coefficients.estimates)
    np.testing.assert_array_equal(loaded.coefficients.covariance, winner.coefficients.covariance)
    # the stored bytes are the winner's own encoding, byte for byte
    stored = store.stored_key("ferry", "v1", "coefficients.parquet")
    assert raw_get(store, stored) == coefficients_bytes(winner.coefficients)


@pytest.mark.parametrize("second_stops_before", [0, 1, 2, None])
@pytest.mark.parametrize("first_stops_before", [0, 1, 2])
def test_interleaved_publishes_of_one_id(
    store: Store, first_stops_before: int, second_stops_before: int | None
):
    """The first publisher stops before its write ``first_stops_before``; the second then runs
    up to before its write ``second_stops_before`` (None: to the end); the first finishes, then
    the second. Whoever writes the manifest first wins, whatever the other wrote before."""
    first = Publisher(store, "first", 0.0, first_stops_before)
    second = Publisher(store, "second", 0.5, second_stops_before)
    first.start_until_paused()
    second.start_until_paused()
    first.finish()
    second.finish()
    if second_stops_before is None:  # the second ran to the end while the first was stopped
        check_winner(store, second, first)
    else:
        check_winner(store, first, second)


def test_the_loser_writing_after_the_winner_committed_changes_nothing(store: Store):
    """The case that used to lose a publication: the loser passed the existence check, then
    the winner published whole, then the loser wrote its data files."""
    loser = Publisher(store, "late", 0.5, 0)
    loser.start_until_paused()
    winner = Publisher(store, "early", 0.0, None)
    winner.start_until_paused()  # runs to the end
    before = {k: raw_get(store, k) for k in store.backend.list(V1)}
    loser.finish()
    check_winner(store, winner, loser)
    after = {k: raw_get(store, k) for k in store.backend.list(V1)}
    assert {k: after[k] for k in before} == before  # nothing of the winner's was replaced
    # the loser's coefficients are an orphan (unlisted, never read); its covariance matrix is
    # the winner's, byte for byte, so it shares the winner's key and replaced nothing
    digest = hashlib.sha256(coefficients_bytes(loser.coefficients)).hexdigest()
    assert set(after) - set(before) == {f"{V1}coefficients.{digest[:16]}.parquet"}
    # orphans block nothing: the loser publishes its contents under a new id
    late = store.publish(
        "ferry", "v2", spec_from_dict(FERRY_SPEC), loser.coefficients, published_by="late"
    )
    assert store.list_versions("ferry") == ["v1", "v2"]
    assert late["files"] != store.load_version("ferry", "v1").manifest["files"]


def test_identical_concurrent_publishes_share_the_data_files(store: Store):
    """Same id, same contents: the data keys already hold the same bytes (accepted after
    verifying); the manifest still goes to exactly one publisher."""
    first = Publisher(store, "first", 0.0, WRITES - 1)
    first.start_until_paused()
    second = Publisher(store, "second", 0.0, None)
    second.start_until_paused()
    first.finish()
    check_winner(store, second, first)
    assert len(store.backend.list(V1)) == WRITES


class FailAfter(Gate):
    """Writes fail after ``n`` succeeded (a publish killed there)."""

    def _count(self) -> None:
        if self.writes == self.pause_before:
            raise KeyboardInterrupt("killed")
        self.writes += 1


@pytest.mark.parametrize("writes_before_kill", [1, 2])
def test_a_retry_with_the_same_contents_reuses_the_verified_leftovers(
    store: Store, writes_before_kill: int
):
    spec, coefficients = spec_from_dict(FERRY_SPEC), ferry_coefficients()
    with pytest.raises(KeyboardInterrupt):
        Store(FailAfter(store.backend, writes_before_kill)).publish(
            "ferry", "v1", spec, coefficients, published_by="t"
        )
    leftovers = {k: raw_get(store, k) for k in store.backend.list(V1)}
    assert len(leftovers) == writes_before_kill and store.list_versions("ferry") == []
    store.publish("ferry", "v1", spec, coefficients, published_by="t")
    after = {k: raw_get(store, k) for k in store.backend.list(V1)}
    assert {k: after[k] for k in leftovers} == leftovers and len(after) == WRITES
    loaded = store.load_version("ferry", "v1")
    np.testing.assert_array_equal(loaded.coefficients.estimates, coefficients.estimates)


class VanishOnce(Gate):
    """The first create-if-absent finds the key present, which is gone when read back (an
    orphan deleted by hand in between)."""

    def put_new(self, key, data):
        self.writes += 1
        if self.writes == 1:
            raise KeyExists(key)
        self.inner.put_new(key, data)


def test_a_data_key_removed_between_create_and_read_back_is_created_again(store: Store):
    spec, coefficients = spec_from_dict(FERRY_SPEC), ferry_coefficients()
    Store(VanishOnce(store.backend, None)).publish(
        "ferry", "v1", spec, coefficients, published_by="t"
    )
    loaded = store.load_version("ferry", "v1")
    np.testing.assert_array_equal(loaded.coefficients.estimates, coefficients.estimates)


def test_a_key_holding_other_bytes_than_its_name_says_is_never_overwritten(store: Store):
    spec, coefficients = spec_from_dict(FERRY_SPEC), ferry_coefficients()
    data = coefficients_bytes(coefficients)
    # sha256 from hashlib (FIPS 180-4 reference implementation); the naming rule of the format
    key = f"{V1}coefficients.{hashlib.sha256(data).hexdigest()[:16]}.parquet"
    raw_put(store, key, b"tampered")
    with pytest.raises(StoreError, match="already holds other bytes"):
        store.publish("ferry", "v1", spec, coefficients, published_by="t")
    assert raw_get(store, key) == b"tampered"
    assert store.list_versions("ferry") == []


def _plain_manifest(coefficients_data: bytes, **extra) -> bytes:
    spec = spec_from_dict(FERRY_SPEC)
    manifest = build_manifest(
        model="ferry",
        version="v1",
        spec=spec,
        spec_dict=spec_to_dict(spec),
        files={"coefficients.parquet": hashlib.sha256(coefficients_data).hexdigest()},
        published_by="older-release",
    )
    return manifest_bytes({**manifest, **extra})


def test_versions_stored_at_the_plain_names_still_load(store: Store):
    """Format 1 manifests without ``stored_as`` (written before content-addressed names, or by
    an outside pipeline) keep loading from ``coefficients.parquet``."""
    coefficients = ferry_coefficients(covariance=False)
    data = coefficients_bytes(coefficients)
    raw_put(store, V1 + "coefficients.parquet", data)
    raw_put(store, V1 + "manifest.json", _plain_manifest(data))
    loaded = store.load_version("ferry", "v1")
    np.testing.assert_array_equal(loaded.coefficients.estimates, coefficients.estimates)
    assert store.stored_key("ferry", "v1", "coefficients.parquet") == V1 + "coefficients.parquet"
    with pytest.raises(VersionExists):
        store.publish("ferry", "v1", spec_from_dict(FERRY_SPEC), coefficients, published_by="t")


@pytest.mark.parametrize(
    ("stored_as", "message"),
    [
        ({"coefficients.parquet": "coefficients.parquet"}, "stored_as.coefficients.parquet"),
        ({"coefficients.parquet": "../../x/coefficients.parquet"}, "stored_as.coefficients"),
        ({}, "stored_as must name exactly the files listed"),
        ([], "stored_as must name exactly the files listed"),
    ],
)
def test_a_stored_as_that_does_not_follow_the_naming_rule_is_refused(
    store: Store, stored_as, message
):
    data = coefficients_bytes(ferry_coefficients(covariance=False))
    raw_put(store, V1 + "coefficients.parquet", data)
    raw_put(store, V1 + "manifest.json", _plain_manifest(data, stored_as=stored_as))
    with pytest.raises(ArtifactError, match=rf"manifest\.json: {message}"):
        store.load_version("ferry", "v1")


def test_stored_key_of_an_unknown_file_or_version(store: Store):
    store.publish("ferry", "v1", spec_from_dict(FERRY_SPEC), ferry_coefficients(), published_by="t")
    with pytest.raises(NotFound, match=r"no file 'model\.pkl'"):
        store.stored_key("ferry", "v1", "model.pkl")
    with pytest.raises(NotFound, match="version 'v2'"):
        store.stored_key("ferry", "v2", "coefficients.parquet")
    manifest = json.loads(raw_get(store, V1 + "manifest.json"))
    assert set(manifest["stored_as"]) == set(manifest["files"])


def test_real_races_of_one_id_on_the_filesystem(tmp_path):
    """Threads released together publish one id each round: one winner, the rest refused, and
    the version loads with the winner's coefficients. (Real races only on the filesystem:
    moto's S3 server does not decide conditional writes atomically, see docs/operations.md.)"""
    store = open_store(str(tmp_path / "store"))
    spec, racers = spec_from_dict(FERRY_SPEC), 4
    for round_ in range(5):
        version, barrier = f"r{round_}", threading.Barrier(racers, timeout=TIMEOUT)
        outcomes: dict[int, str] = {}

        def race(i: int, version: str = version, barrier=barrier, outcomes=outcomes) -> None:
            barrier.wait()
            try:
                store.publish(
                    "ferry", version, spec, ferry_coefficients(i * 0.1), published_by=f"p{i}"
                )
                outcomes[i] = "won"
            except VersionExists:
                outcomes[i] = "exists"

        threads = [threading.Thread(target=race, args=(i,), daemon=True) for i in range(racers)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(TIMEOUT)
        assert not any(t.is_alive() for t in threads)
        winners = [i for i, o in outcomes.items() if o == "won"]
        assert len(winners) == 1 and len(outcomes) == racers, outcomes
        loaded = store.load_version("ferry", version)
        assert loaded.manifest["published_by"] == f"p{winners[0]}"
        np.testing.assert_array_equal(
            loaded.coefficients.estimates, ferry_coefficients(winners[0] * 0.1).estimates
        )
