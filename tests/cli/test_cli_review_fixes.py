"""`route`, `promote` and `rollback` keep the shadow unless told otherwise and say which
generation (and what state) they replaced; the HTTP admin endpoint follows the same rule."""

from __future__ import annotations

import pytest
from cli_cases import publish

from model_store import open_store
from service.api import create_app
from tests.store.store_cases import publish_ferry


@pytest.fixture
def routed(cli, ferry_files):
    for version in ("v1", "v2", "v3"):
        assert publish(cli, ferry_files, version).code == 0
    first = cli("route", "ferry", "--live", "v1=100", "--shadow", "v2", "--reason", "shadow v2")
    assert first.code == 0, first.err
    return cli


def test_widening_a_canary_keeps_the_shadow(routed):
    out = routed("route", "ferry", "--live", "v1=95", "v3=5", "--reason", "canary", "--json")
    assert out.code == 0, out.err
    assert out.json()["shadow"] == "v2" and out.json()["generation"] == 2


def test_no_shadow_clears_it_and_shadow_replaces_it(routed):
    out = routed("route", "ferry", "--live", "v1=100", "--shadow", "v3", "--reason", "r", "--json")
    assert out.json()["shadow"] == "v3"
    out = routed("route", "ferry", "--live", "v1=100", "--no-shadow", "--reason", "r", "--json")
    assert out.code == 0, out.err
    assert out.json()["shadow"] is None
    with pytest.raises(SystemExit) as refused:
        routed("route", "ferry", "--live", "v1=1", "--shadow", "v2", "--no-shadow", "--reason", "r")
    assert refused.value.code == 2
    assert "not allowed with" in routed.capsys.readouterr().err


def test_every_change_names_the_generation_and_state_it_replaced(routed):
    out = routed("route", "ferry", "--live", "v1=90", "v2=10", "--reason", "canary", "--by", "bo")
    assert out.code == 0, out.err
    assert (
        "replaced generation 1 (v1 100%, shadow v2) with generation 2 (v1 90%, v2 10%, shadow v2)"
        in out.out
    )
    out = routed("promote", "ferry", "v2", "--by", "bo")
    assert (
        "replaced generation 2 (v1 90%, v2 10%, shadow v2) with generation 3 (v2 100%, no shadow)"
        in out.out
    )
    assert "generation 2 was recorded by bo at" in out.out and ": canary\n" in out.out
    assert "generation 3 by bo: promote v2 to 100%" in out.out
    out = routed("rollback", "ferry", "--expect-generation", "3")
    assert (
        "replaced generation 3 (v2 100%, no shadow) with generation 4 (v1 90%, v2 10%, shadow v2)"
        in out.out
    )
    out = routed("rollback", "ferry", "--json")
    replaced = out.json()["replaced"]
    assert (replaced["generation"], replaced["live"], replaced["shadow"]) == (
        4,
        {"v1": 90.0, "v2": 10.0},
        "v2",
    )
    assert out.json()["generation"] == 5


def test_the_first_route_replaces_generation_zero(cli, ferry_files):
    assert publish(cli, ferry_files, "v1").code == 0
    out = cli("route", "ferry", "--live", "v1=1", "--reason", "first")
    assert (
        "replaced generation 0 (nothing routed) with generation 1 (v1 100%, no shadow)" in out.out
    )


def test_the_http_routing_change_keeps_the_shadow_unless_given(tmp_path, monkeypatch):
    store = open_store(str(tmp_path / "store"))
    for version in ("v1", "v2", "v3"):
        publish_ferry(store, version, shift=0.1 * int(version[1:]))
    monkeypatch.setenv("CHOICECAST_ADMIN_TOKENS", "review-admin-token")
    app = create_app({"store": store.uri, "poll_seconds": 0, "access_log": False})
    client = app.test_client()

    def put(body):
        return client.put(
            "/v1/models/ferry/routing",
            json=body,
            headers={"Authorization": "Bearer review-admin-token"},
        )

    assert put({"live": {"v1": 1}, "shadow": "v2", "reason": "shadow"}).status_code == 200
    r = put({"live": {"v1": 9, "v3": 1}, "reason": "canary"})
    assert r.status_code == 200, r.get_json()
    assert r.get_json()["shadow"] == "v2"
    r = put({"live": {"v1": 1}, "shadow": None, "reason": "stop shadow"})
    assert r.status_code == 200 and r.get_json()["shadow"] is None
    assert store.get_routing("ferry").shadow is None
