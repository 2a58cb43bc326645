"""Properties of routing histories under random sequences of changes (hypothesis).

Invariants (common practice for an append-only log with optimistic concurrency): every
recorded change gets the next generation; earlier records never change; a rollback restores
exactly the live weights and shadow of the generation before the one it undoes; a refused
change writes nothing.
"""

from __future__ import annotations

import shutil
import tempfile
from pathlib import Path

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from store_cases import publish_ferry

from model_store import RoutingError, open_store

VERSIONS = ("v1", "v2", "v3")

weights = st.dictionaries(
    st.sampled_from(VERSIONS), st.integers(min_value=0, max_value=100), min_size=1, max_size=3
)
change = st.one_of(
    st.tuples(st.just("route"), weights, st.one_of(st.none(), st.sampled_from(VERSIONS))),
    st.tuples(st.just("promote"), st.sampled_from(VERSIONS), st.none()),
    st.tuples(st.just("rollback"), st.none(), st.none()),
)


TEMPLATE = Path(tempfile.mkdtemp(prefix="routing-template-")) / "store"


def fresh_store(root: str):
    """A store holding the three published versions (copied from a template made once)."""
    if not TEMPLATE.exists():
        template = open_store(str(TEMPLATE))
        for v in VERSIONS:
            publish_ferry(template, v)
    shutil.copytree(TEMPLATE, Path(root) / "store")
    return open_store(str(Path(root) / "store"))


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(change, min_size=1, max_size=8))
def test_random_histories_keep_their_invariants(steps):
    with tempfile.TemporaryDirectory() as root:
        store = fresh_store(root)
        records: dict[int, bytes] = {}
        for kind, arg, shadow in steps:
            before = store.get_routing("ferry")
            try:
                if kind == "route":
                    state = store.change_routing("ferry", arg, shadow, reason="r", changed_by="p")
                elif kind == "promote":
                    state = store.promote("ferry", arg, changed_by="p")
                else:
                    state = store.rollback("ferry", changed_by="p")
            except RoutingError:
                assert store.routing_generation("ferry") == before.generation
                continue
            assert state.generation == before.generation + 1
            assert state.previous_generation == before.generation
            if kind == "rollback":
                restored = store.history("ferry")[before.generation - 2]
                assert (dict(state.live), state.shadow) == (dict(restored.live), restored.shadow)
            if kind == "route":
                assert dict(state.live) == {k: float(v) for k, v in arg.items()}
                assert abs(sum(state.shares().values()) - 1) < 1e-12
            for generation, data in records.items():
                key = f"models/ferry/routing/{generation:010d}.json"
                assert store.backend.get(key) == data
            key = f"models/ferry/routing/{state.generation:010d}.json"
            records[state.generation] = store.backend.get(key)
        assert [s.generation for s in store.history("ferry")] == sorted(records)


def teardown_module() -> None:
    shutil.rmtree(TEMPLATE.parent, ignore_errors=True)
