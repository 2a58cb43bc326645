"""Hostile input against the real service (gunicorn, 2 workers) with small configured limits.

Every request below must get a 4xx problem document (``application/problem+json``, RFC 9457)
naming what is wrong, never a 5xx, a NaN or a partial answer; the workers' memory stays bounded
(peak resident set read from /proc/PID/status before and after), and the service still
answers a valid request correctly afterwards.
"""

from __future__ import annotations

import http.client
import json
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest

from model_store import open_store
from tests.support.payloads import core_probabilities, situations_for
from tests.support.processes import HOST, memory_kib, serving, worker_pids

MODEL = "wrenmouth_commute"
MAX_BODY = 1_000_000
MAX_SITUATIONS = 200
ARROW = "application/vnd.apache.arrow.stream"
JSON = "application/json"
PROBLEM = "application/problem+json"
# Peak resident memory a worker may gain over the whole barrage (the largest legitimate body
# is 1 MB; a copy or two of it in decoded form is expected, hundreds of MB are not).
MAX_PEAK_GROWTH_KIB = 150 * 1024
UNKNOWN = "no-such-name-"


def send(port: int, method: str, path: str, body: bytes = b"", headers=None, chunked=False):
    """One raw request (paths are sent exactly as given, never normalised)."""
    conn = http.client.HTTPConnection(HOST, port, timeout=30)
    try:
        conn.putrequest(method, path, skip_accept_encoding=True)
        for k, v in (headers or {}).items():
            conn.putheader(k, v)
        if chunked:
            conn.putheader("Transfer-Encoding", "chunked")
            conn.endheaders()
            for i in range(0, len(body), 65536):
                piece = body[i : i + 65536]
                conn.send(f"{len(piece):x}\r\n".encode() + piece + b"\r\n")
            conn.send(b"0\r\n\r\n")
        else:
            conn.putheader("Content-Length", str(len(body)))
            conn.endheaders(body)
        response = conn.getresponse()
        return response.status, dict(response.getheaders()), response.read()
    finally:
        conn.close()


@pytest.fixture()
def hostile_server(demo_store: Path, logs: Path):
    env = {
        "CHOICECAST_MAX_BODY_BYTES": str(MAX_BODY),
        "CHOICECAST_MAX_SITUATIONS": str(MAX_SITUATIONS),
    }
    with serving(str(demo_store), logs, env=env, workers=2, poll_seconds=1.0) as server:
        yield server, demo_store


def good_situations(store: Path, n: int = 2) -> list[dict]:
    spec = open_store(str(store)).load_version(MODEL, "v1").spec
    return situations_for(spec, n, seed=11)


def json_bytes(obj) -> bytes:
    return json.dumps(obj).encode()


def arrow_stream(table: pa.Table, compression: str | None = None) -> bytes:
    sink = pa.BufferOutputStream()
    options = pa.ipc.IpcWriteOptions(compression=compression)
    with pa.ipc.new_stream(sink, table.schema, options=options) as writer:
        writer.write_table(table)
    return sink.getvalue().to_pybytes()


def cases(store: Path) -> list[tuple[str, str, str, bytes, dict, set[int], str | None]]:
    """(name, method, path, body, headers, allowed statuses, a JSON path the errors name)."""
    good = good_situations(store)
    one = good[0]
    alt = next(iter(one["attributes"]))
    attr = next(iter(one["attributes"][alt]))
    score = f"/v1/models/{MODEL}/score"
    js = {"Content-Type": JSON}

    def with_value(raw: str) -> bytes:
        """The first situation with one attribute value replaced by the literal ``raw``."""
        attributes = {**one["attributes"], alt: {**one["attributes"][alt], attr: "@RAW@"}}
        text = json.dumps({"situations": [dict(one, attributes=attributes)]})
        assert text.count('"@RAW@"') == 1
        return text.replace('"@RAW@"', raw).encode()

    field = f"$.situations[0].attributes.{alt}.{attr}"
    scenarios = f"/v1/models/{MODEL}/scenarios"

    def scenario_with_value(raw: str) -> bytes:
        """A scenario whose one change sets the attribute to the literal ``raw``."""
        change = {"alternative": alt, "attribute": attr, "op": "set", "value": "@RAW@"}
        body = {"situations": good, "variants": [{"name": "a", "changes": [change]}]}
        return json.dumps(body).replace('"@RAW@"', raw).encode()

    many_situations = {"situations": [one] * (MAX_SITUATIONS + 1)}
    many_columns = {
        "columns": {
            "id": [f"s{i}" for i in range(MAX_SITUATIONS + 1)],
            "attributes": {alt: {attr: [1.0] * (MAX_SITUATIONS + 1)}},
        }
    }
    many_alternatives = dict(one, attributes={f"alt{i}": {attr: 1.0} for i in range(20_000)})
    bomb_rows = 20_000_000  # 400 MB decompressed, about 13 kB on the wire
    bomb = pa.table(
        {
            "situation": pa.array(np.zeros(bomb_rows, dtype=np.int64)),
            "alternative": pa.DictionaryArray.from_arrays(
                pa.array(np.zeros(bomb_rows, dtype=np.int32)), pa.array([alt])
            ),
            attr: pa.array(np.zeros(bomb_rows)),
        }
    )
    wide_arrow = pa.table({f"col{i}": pa.array([1.0]) for i in range(5000)})
    # fmt: off
    return [
        ("oversized body", "POST", score, b" " * (MAX_BODY + 1), js, {413}, None),
        (
            "oversized chunked body",
            "POST",
            score,
            json_bytes({"situations": [one] * 5000}),
            js | {"chunked": "1"},
            {413},
            None,
        ),
        ("deeply nested array", "POST", score, b"[" * 200_000 + b"]" * 200_000, js, {400}, "$"),
        (
            "deeply nested value",
            "POST",
            score,
            with_value("[" * 50_000 + "]" * 50_000),
            js,
            {400, 422},
            None,
        ),
        ("1e400", "POST", score, with_value("1e400"), js, {422}, field),
        ("-1e400", "POST", score, with_value("-1e400"), js, {422}, field),
        ("NaN literal", "POST", score, with_value("NaN"), js, {422}, field),
        ("Infinity literal", "POST", score, with_value("Infinity"), js, {422}, field),
        ("huge integer", "POST", score, with_value("9" * 5000), js, {400, 422}, None),
        ("invalid UTF-8", "POST", score, b'{"situations": ["\xff\xfe"]}', js, {400}, None),
        ("text/plain", "POST", score, json_bytes({"situations": good}), {"Content-Type": "text/plain"}, {415}, None),
        ("form", "POST", score, b"situations=1", {"Content-Type": "application/x-www-form-urlencoded"}, {415}, None),
        ("no content type", "POST", score, json_bytes({"situations": good}), {}, {415}, None),
        ("JSON sent as Arrow", "POST", score, json_bytes({"situations": good}), {"Content-Type": ARROW}, {400}, None),
        ("garbage Arrow", "POST", score, b"\xff\xff\xff\xff" + b"\x00" * 64, {"Content-Type": ARROW}, {400}, None),
        ("compressed Arrow bomb", "POST", score, arrow_stream(bomb, "zstd"), {"Content-Type": ARROW}, {400, 413, 422}, None),
        ("5000 unknown Arrow columns", "POST", score, arrow_stream(wide_arrow), {"Content-Type": ARROW}, {400, 422}, None),
        ("unknown top-level field", "POST", score, json_bytes({"situations": good, "admin": True}), js, {400}, "$.admin"),
        (
            "unknown situation field",
            "POST",
            score,
            json_bytes({"situations": [dict(one, colour="red")]}),
            js,
            {400, 422},
            "$.situations[0].colour",
        ),
        (
            "unknown alternative",
            "POST",
            score,
            json_bytes({"situations": [dict(one, attributes={**one["attributes"], "rocket": {attr: 1.0}})]}),
            js,
            {422},
            "$.situations[0].attributes.rocket",
        ),
        ("20000 alternatives", "POST", score, json_bytes({"situations": [many_alternatives]}), js, {413, 422}, None),
        ("too many situations", "POST", score, json_bytes(many_situations), js, {413}, "$.situations"),
        ("too many columnar situations", "POST", score, json_bytes(many_columns), js, {413}, None),
        ("very long id", "POST", score, json_bytes({"situations": [dict(one, id="x" * 100_000)]}), js, {400}, "$.situations[0].id"),
        ("not an object", "POST", score, b"[1, 2, 3]", js, {400}, "$"),
        # What-if scenarios: the same limits and refusals.
        ("scenario, 20000 alternatives", "POST", scenarios, json_bytes({"situations": [many_alternatives], "variants": [{"name": "a"}]}), js, {413, 422}, None),
        ("scenario, NaN change", "POST", scenarios, scenario_with_value("NaN"), js, {422}, "$.variants[0].changes[0].value"),
        ("scenario, 1e400 change", "POST", scenarios, scenario_with_value("1e400"), js, {422}, "$.variants[0].changes[0].value"),
        ("scenario, 65 variants", "POST", scenarios, json_bytes({"situations": good, "variants": [{"name": f"v{i}"} for i in range(65)]}), js, {400}, "$.variants"),
        ("scenario, unknown change field", "POST", scenarios, json_bytes({"situations": good, "variants": [{"name": "a", "changes": [{"alternative": alt, "attribute": attr, "op": "set", "value": 1, "eval": "x"}]}]}), js, {400}, "$.variants[0].changes[0].eval"),
        ("empty body", "POST", score, b"", js, {400}, None),
        # Path traversal and encoded separators in model and version names.
        ("traversal in model", "POST", "/v1/models/..%2F..%2Fetc/score", json_bytes({"situations": good}), js, {400, 404}, None),
        ("dot-dot model", "GET", "/v1/models/%2e%2e", b"", {}, {400, 404}, None),
        ("traversal in version", "POST", f"/v1/models/{MODEL}/versions/..%2Fv1/score", json_bytes({"situations": good}), js, {400, 404}, None),
        ("dot-dot version", "GET", f"/v1/models/{MODEL}/versions/%2e%2e", b"", {}, {400, 404}, None),
        ("manifest as version", "GET", f"/v1/models/{MODEL}/versions/v1%2Fmanifest.json", b"", {}, {400, 404}, None),
        ("absolute path version", "GET", f"/v1/models/{MODEL}/versions/%2Fetc%2Fpasswd", b"", {}, {400, 404}, None),
        ("NUL in name", "GET", "/v1/models/wren%00mouth", b"", {}, {400, 404}, None),
        ("backslash traversal", "GET", f"/v1/models/{MODEL}/versions/..%5C..%5Cv1", b"", {}, {400, 404}, None),
        ("dotfile version", "GET", f"/v1/models/{MODEL}/versions/.tmp-x", b"", {}, {400, 404}, None),
        # Unknown names: refused, and (checked below) never a metric label.
        *[("unknown version", "GET", f"/v1/models/{MODEL}/versions/{UNKNOWN}v{i}", b"", {}, {404}, None) for i in range(20)],
        *[("unknown model", "POST", f"/v1/models/{UNKNOWN}m{i}/score", json_bytes({"situations": good}), js, {404}, None) for i in range(20)],
    ]
    # fmt: on


def test_hostile_requests_get_problem_documents_and_memory_stays_bounded(hostile_server) -> None:
    server, store = hostile_server
    workers = worker_pids(server.pid)
    peaks_before = {pid: memory_kib(pid, "VmHWM") for pid in workers}
    failures = []
    for name, method, path, body, headers, allowed, named in cases(store):
        headers = dict(headers)
        chunked = headers.pop("chunked", None) is not None
        for _ in range(2):  # both workers, most likely
            status, response_headers, payload = send(
                server.port, method, path, body, headers, chunked=chunked
            )
            if status not in allowed:
                failures.append(f"{name}: {status} {payload[:300]!r}")
                break
            if not response_headers.get("Content-Type", "").startswith(PROBLEM):
                failures.append(f"{name}: content type {response_headers.get('Content-Type')}")
                break
            problem = json.loads(payload)
            if problem.get("status") != status or not problem.get("detail"):
                failures.append(f"{name}: not a problem document: {problem}")
                break
            if named and not any(e["path"].startswith(named) for e in problem.get("errors", [])):
                failures.append(f"{name}: no error names {named}: {problem.get('errors')}")
                break
            if len(payload) > 256 * 1024:
                failures.append(f"{name}: a {len(payload)}-byte error document")
                break
    # The same workers survived the barrage, within the memory bound.
    assert worker_pids(server.pid) == workers
    growth = {pid: memory_kib(pid, "VmHWM") - peaks_before[pid] for pid in workers}
    print("peak resident growth per worker (KiB):", growth)
    assert not failures, "\n".join(failures)
    assert max(growth.values()) < MAX_PEAK_GROWTH_KIB, growth

    # Names from the path never become metric labels (each would be a new time series).
    status, _, payload = send(server.port, "GET", "/metrics")
    assert status == 200 and UNKNOWN.encode() not in payload

    # And a valid request still gets the core's answer.
    good = good_situations(store)
    status, _, payload = send(
        server.port,
        "POST",
        f"/v1/models/{MODEL}/versions/v1/score",
        json_bytes({"situations": good}),
        {"Content-Type": JSON},
    )
    assert status == 200
    artifact = open_store(str(store)).load_version(MODEL, "v1")
    expected = core_probabilities(artifact.spec, artifact.coefficients, good)
    assert [s["probabilities"] for s in json.loads(payload)["situations"]] == expected
