"""Routing changes keep the shadow unless told otherwise; any recorded generation reads back."""

from __future__ import annotations

import pytest
from store_cases import publish_ferry

from model_store import KEEP_SHADOW, RoutingError, Store
from model_store.backends.base import Backend, KeyExists


@pytest.fixture
def ferry(store: Store) -> Store:
    for v in ("v1", "v2", "v3"):
        publish_ferry(store, v, shift=0.1 * int(v[1:]))
    return store


def change(store: Store, live, *shadow, **kw):
    return store.change_routing("ferry", live, *shadow, reason="r", changed_by="ana", **kw)


def test_a_route_without_a_shadow_keeps_the_current_one(ferry: Store):
    change(ferry, {"v1": 100}, "v2")
    widened = change(ferry, {"v1": 95, "v2": 5})  # widening a canary: shadow not named
    assert (dict(widened.live), widened.shadow) == ({"v1": 95.0, "v2": 5.0}, "v2")
    assert change(ferry, {"v1": 90, "v3": 10}, KEEP_SHADOW).shadow == "v2"


def test_none_clears_and_a_version_replaces_the_shadow(ferry: Store):
    change(ferry, {"v1": 100}, "v2")
    assert change(ferry, {"v1": 100}, "v3").shadow == "v3"
    assert change(ferry, {"v1": 100}, None).shadow is None
    assert change(ferry, {"v1": 50, "v2": 50}).shadow is None  # nothing to keep


def test_a_kept_shadow_that_becomes_the_only_live_version_is_dropped(ferry: Store):
    # shadowing the version taking 100% of live traffic is refused when asked for explicitly;
    # keeping it drops it, as promote does
    change(ferry, {"v1": 100}, "v2")
    with pytest.raises(RoutingError, match="shadow"):
        change(ferry, {"v2": 100}, "v2")
    assert change(ferry, {"v2": 100}).shadow is None


def test_promote_keeps_another_shadow_and_clears_its_own(ferry: Store):
    change(ferry, {"v1": 90, "v2": 10}, "v3")
    assert ferry.promote("ferry", "v2", changed_by="ana").shadow == "v3"
    assert ferry.promote("ferry", "v3", changed_by="ana").shadow is None


def test_the_shadow_kept_is_that_of_the_expected_generation(ferry: Store):
    first = change(ferry, {"v1": 100}, "v2")
    state = change(ferry, {"v1": 80, "v3": 20}, expected_generation=first.generation)
    assert state.shadow == "v2" and state.previous_generation == first.generation


def test_any_recorded_generation_reads_back(ferry: Store):
    first = change(ferry, {"v1": 100}, "v2")
    second = change(ferry, {"v1": 50, "v3": 50}, None)
    assert ferry.get_routing("ferry", 0).is_empty
    assert ferry.get_routing("ferry", 1) == first
    assert ferry.get_routing("ferry", 2) == second == ferry.get_routing("ferry")
    with pytest.raises(RoutingError, match="generation 3"):
        ferry.get_routing("ferry", 3)
    with pytest.raises(RoutingError, match="generation"):
        ferry.get_routing("ferry", -1)


def test_no_backend_has_an_overwriting_write(store: Store):
    # nothing published is ever replaced (DESIGN): create-if-absent is the only write
    for cls in (Backend, type(store.backend)):
        assert not hasattr(cls, "put"), cls
    store.backend.put_new("models/x/probe.json", b"1")
    with pytest.raises(KeyExists):
        store.backend.put_new("models/x/probe.json", b"2")
    assert store.backend.get("models/x/probe.json") == b"1"
