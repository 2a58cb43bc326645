"""Routing state, its append-only history, rollback and lost-update protection, on both
backends."""

from __future__ import annotations

import json
import multiprocessing
import multiprocessing.forkserver
import threading

import pytest
from race_worker import race
from store_cases import publish_ferry, raw_get, raw_put, reopen

from model_store import NotFound, RoutingConflict, RoutingError, Store, open_store


@pytest.fixture
def ferry(store: Store) -> Store:
    for v in ("v1", "v2", "v3"):
        publish_ferry(store, v, shift=0.1 * int(v[1:]))
    return store


def route(store: Store, live, shadow=None, expected=None, who="ana", why="test"):
    return store.change_routing(
        "ferry", live, shadow, reason=why, changed_by=who, expected_generation=expected
    )


def test_never_routed_is_generation_zero(ferry: Store):
    state = ferry.get_routing("ferry")
    assert (state.generation, dict(state.live), state.shadow) == (0, {}, None)
    assert ferry.history("ferry") == []
    assert ferry.generations() == {"ferry": 0}


def test_change_is_recorded_with_who_when_why(ferry: Store):
    state = route(ferry, {"v1": 90, "v2": 10}, shadow="v3", who="ana", why="canary v2")
    assert state.generation == 1
    current = ferry.get_routing("ferry")
    assert current == state
    assert dict(current.live) == {"v1": 90.0, "v2": 10.0}  # stored as given
    assert current.shares() == {"v1": 0.9, "v2": 0.1}  # normalised when routing
    assert current.versions() == ("v1", "v2", "v3")
    assert (current.changed_by, current.reason, current.shadow) == ("ana", "canary v2", "v3")
    assert current.changed_at.endswith("Z")
    record = json.loads(raw_get(ferry, "models/ferry/routing/0000000001.json"))
    assert record["previous_generation"] == 0 and record["action"] == "route"
    assert ferry.routing_generation("ferry") == 1
    assert ferry.generations() == {"ferry": 1}


def test_history_is_append_only_and_rollback_restores_the_previous_state(ferry: Store):
    route(ferry, {"v1": 1}, why="first")
    route(ferry, {"v1": 95, "v2": 5}, why="canary")
    first_record = raw_get(ferry, "models/ferry/routing/0000000001.json")
    back = ferry.rollback("ferry", changed_by="bo", reason="v2 misbehaves")
    assert back.generation == 3 and back.action == "rollback" and back.restored_generation == 1
    assert dict(back.live) == {"v1": 1.0}
    # a second rollback restores the state before the current one: it undoes the first
    again = ferry.rollback("ferry", changed_by="bo")
    assert dict(again.live) == {"v1": 95.0, "v2": 5.0}
    history = ferry.history("ferry")
    assert [s.generation for s in history] == [1, 2, 3, 4]
    assert [s.action for s in history] == ["route", "route", "rollback", "rollback"]
    assert [s.reason for s in history][:3] == ["first", "canary", "v2 misbehaves"]
    assert raw_get(ferry, "models/ferry/routing/0000000001.json") == first_record


def test_rollback_needs_an_earlier_state(ferry: Store):
    with pytest.raises(RoutingError, match="never been routed"):
        ferry.rollback("ferry", changed_by="bo")
    route(ferry, {"v1": 1})
    with pytest.raises(RoutingError, match="first routing"):
        ferry.rollback("ferry", changed_by="bo")
    assert ferry.routing_generation("ferry") == 1


def test_promote_routes_everything_and_clears_a_matching_shadow(ferry: Store):
    route(ferry, {"v1": 90, "v2": 10}, shadow="v2")
    state = ferry.promote("ferry", "v2", changed_by="ana")
    assert (dict(state.live), state.shadow, state.action) == ({"v2": 1.0}, None, "promote")
    assert "promote v2" in state.reason


def test_stale_change_is_refused_and_writes_nothing(ferry: Store):
    route(ferry, {"v1": 1})
    route(ferry, {"v1": 50, "v2": 50}, expected=1)
    with pytest.raises(
        RoutingConflict, match=r"computed from generation 1 .* current generation is 2"
    ):
        route(ferry, {"v1": 1, "v3": 1}, expected=1)
    with pytest.raises(RoutingConflict):
        ferry.rollback("ferry", changed_by="x", expected_generation=1)
    assert ferry.routing_generation("ferry") == 2
    assert dict(ferry.get_routing("ferry").live) == {"v1": 50.0, "v2": 50.0}


def test_two_operators_from_the_same_generation_one_wins(ferry: Store):
    """Both read generation 1, both write: the second write is refused, not merged."""
    route(ferry, {"v1": 1})
    base = ferry.get_routing("ferry").generation
    route(ferry, {"v1": 90, "v2": 10}, expected=base, who="ana")
    with pytest.raises(RoutingConflict):
        route(ferry, {"v1": 90, "v3": 10}, expected=base, who="bo")
    assert [s.changed_by for s in ferry.history("ferry")] == ["ana", "ana"]


@pytest.mark.parametrize(
    ("live", "shadow", "message"),
    [
        ({}, None, "at least one version"),
        ({"v1": -1, "v2": 2}, None, r"live\.v1: weight must be finite and >= 0"),
        ({"v1": float("nan")}, None, r"live\.v1: weight must be finite"),
        ({"v1": float("inf")}, None, r"live\.v1: weight must be finite"),
        ({"v1": 0, "v2": 0}, None, "sum to more than 0"),
        ({"v1": 1e308, "v2": 1e308}, None, "sum to more than the largest number"),
        ({"v1": "lots"}, None, r"live\.v1: weight must be a number"),
        ({"v1": 1, "v2": 0}, "v1", "already takes 100%"),
        ({"v7": 1}, None, r"live\.v7: version 'v7' of 'ferry' is not published"),
        ({"v1": 1}, "v8", r"shadow: version 'v8'"),
    ],
)
def test_invalid_changes_are_refused(ferry: Store, live, shadow, message):
    route(ferry, {"v1": 1})
    with pytest.raises(RoutingError, match=message):
        route(ferry, live, shadow)
    assert ferry.routing_generation("ferry") == 1


def test_reason_is_required(ferry: Store):
    with pytest.raises(RoutingError, match="reason"):
        route(ferry, {"v1": 1}, why="  ")


def test_unknown_model_is_refused(ferry: Store):
    with pytest.raises(NotFound, match="model 'boat'"):
        ferry.change_routing("boat", {"v1": 1}, reason="r", changed_by="a")


def test_a_version_that_fails_to_load_is_never_routed(ferry: Store):
    key = ferry.stored_key("ferry", "v2", "coefficients.parquet")
    raw_put(ferry, key, raw_get(ferry, key)[:-10])
    with pytest.raises(RoutingError, match=r"live\.v2: version 'v2' does not load: .*checksum"):
        route(ferry, {"v1": 9, "v2": 1})
    with pytest.raises(RoutingError, match="shadow: version 'v2' does not load"):
        route(ferry, {"v1": 1}, shadow="v2")
    assert ferry.routing_generation("ferry") == 0


def test_routing_survives_reopening_the_store(ferry: Store):
    route(ferry, {"v1": 3, "v2": 1})
    assert reopen(ferry).get_routing("ferry") == ferry.get_routing("ferry")


def test_concurrent_changes_in_separate_processes_one_wins(tmp_path):
    """Real concurrency on the filesystem backend: several processes write from the same base;
    exactly one create succeeds (link(2) is exclusive), the rest are refused."""
    root = str(tmp_path / "store")
    store = open_store(root)
    for v in ("v1", "v2", "v3", "v4"):
        publish_ferry(store, v)
    ctx = multiprocessing.get_context("forkserver")
    ctx.set_forkserver_preload(["race_worker"])
    barrier, results = ctx.Barrier(4), ctx.Queue()
    procs = [
        ctx.Process(target=race, args=(root, v, 0, barrier, results))
        for v in ("v1", "v2", "v3", "v4")
    ]
    try:
        for p in procs:
            p.start()
        for p in procs:
            p.join(timeout=60)
        assert all(p.exitcode == 0 for p in procs)
        outcomes = sorted(results.get(timeout=5) for _ in procs)
    finally:
        for p in procs:
            if p.is_alive():
                p.kill()
                p.join(timeout=10)
        stop = getattr(multiprocessing.forkserver._forkserver, "_stop", None)
        if stop is not None:
            stop()  # the fork server process ends with this test, not with the session
    assert outcomes == ["conflict", "conflict", "conflict", "won"]
    assert [s.generation for s in store.history("ferry")] == [1]


def test_concurrent_changes_in_threads_one_wins_per_generation(tmp_path):
    """Threads racing on the same filesystem store: every generation is written exactly once
    and no change is lost silently (each is recorded or refused with a conflict).

    Filesystem only: moto's server checks If-None-Match and then stores, without a lock, so
    two truly simultaneous creates can both pass there (AWS S3 itself decides atomically).
    The S3 backend's refusal of a stale create is covered by the interleaved test above.
    """
    ferry = open_store(str(tmp_path / "store"))
    for v in ("v1", "v2", "v3"):
        publish_ferry(ferry, v)
    outcomes: list[str] = []
    lock = threading.Lock()
    start = threading.Barrier(4)

    def worker(version: str) -> None:
        start.wait(timeout=20)
        for _ in range(3):
            base = ferry.routing_generation("ferry")
            try:
                route(ferry, {version: 1}, expected=base, who=version)
                result = "won"
            except RoutingConflict:
                result = "conflict"
            with lock:
                outcomes.append(result)

    threads = [threading.Thread(target=worker, args=(v,)) for v in ("v1", "v2", "v3", "v1")]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=120)
    history = ferry.history("ferry")
    assert len(outcomes) == 12
    assert outcomes.count("won") == len(history)
    assert [s.generation for s in history] == list(range(1, len(history) + 1))
    assert all(s.previous_generation == s.generation - 1 for s in history)


def test_shares_of_weights_near_the_largest_float_are_their_proportions():
    """A state recorded before sums were checked still gives shares summing to 1."""
    from model_store.routing import RoutingState

    state = RoutingState("ferry", 3, live={"v1": 1e308, "v2": 1e308, "v3": 0.0})
    assert state.shares() == {"v1": 0.5, "v2": 0.5, "v3": 0.0}
