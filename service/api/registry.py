"""The per-process view of the store: compiled versions and the routing snapshot.

- A version is loaded (checksums verified by the store) and compiled once per process, cached
  by (model, version).
- The routing snapshot is an immutable object replaced by one reference assignment, so a
  request sees either the old or the new state, never a mix.
- A poller thread (one per worker process, started after fork) refreshes the snapshot.  A
  version that fails to load is never routed: that model keeps its last good routing and the
  replica reports itself degraded; an unreachable store keeps everything as it was.
"""

from __future__ import annotations

import logging
import os
import threading
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

from . import metrics

log = logging.getLogger("choicecast.registry")


FALLBACK_GENERATIONS = 32
"""How many older routing generations a new worker tries when the newest does not load."""


class UnknownModel(LookupError):
    pass


class UnknownVersion(LookupError):
    pass


class VersionUnavailable(RuntimeError):
    """A version exists but cannot be loaded now (store unreachable, corrupt artifact)."""


@dataclass(frozen=True)
class LoadedModel:
    name: str
    version: str
    compiled: Any
    """The core's CompiledModel."""
    spec: Any
    coefficients: Any
    manifest: Any


@dataclass(frozen=True)
class ModelRouting:
    generation: int
    live: Mapping[str, float]
    shadow: str | None


@dataclass(frozen=True)
class Snapshot:
    routes: Mapping[str, ModelRouting] = field(default_factory=dict)
    """Last good routing of every routed model."""
    models: tuple[str, ...] = ()
    problems: tuple[str, ...] = ("not loaded yet",)
    """Why the replica is degraded; empty when ready."""
    refreshed_at: float = 0.0


def _routing_of(state: Any) -> ModelRouting:
    live = getattr(state, "live", None) or {}
    return ModelRouting(
        generation=int(getattr(state, "generation", 0)),
        live={str(v): float(w) for v, w in dict(live).items() if float(w) > 0},
        shadow=getattr(state, "shadow", None),
    )


class Registry:
    """Compiled versions and routing of one worker process."""

    def __init__(
        self,
        open_store: Callable[[], Any],
        compile_model: Callable[[Any, Any], Any],
        poll_seconds: float,
        cache_size: int = 64,
    ):
        self._open_store = open_store
        self._compile = compile_model
        self._store: Any = None
        self.poll_seconds = poll_seconds
        self._cache: dict[tuple[str, str], LoadedModel] = {}
        self._cache_size = cache_size
        self._load_lock = threading.Lock()
        self._refresh_lock = threading.Lock()
        self.snapshot = Snapshot()
        self._poller_pid: int | None = None
        self._stop = threading.Event()

    # -- the store -----------------------------------------------------------------------

    @property
    def store(self) -> Any:
        if self._store is None:
            self._store = self._open_store()
        return self._store

    def list_versions(self, model: str) -> list[str]:
        if model not in self.known_models():
            raise UnknownModel(model)
        return [str(v) for v in self.store.list_versions(model)]

    def known_models(self) -> tuple[str, ...]:
        return self.snapshot.models

    # -- compiled versions ---------------------------------------------------------------

    def get(self, model: str, version: str) -> LoadedModel:
        """The compiled version, loading and compiling it on first use."""
        key = (model, version)
        hit = self._cache.get(key)
        if hit is not None:
            return hit
        with self._load_lock:
            hit = self._cache.get(key)
            if hit is not None:
                return hit
            loaded = self._load(model, version)
            self._evict()
            self._cache[key] = loaded
            return loaded

    def _load(self, model: str, version: str) -> LoadedModel:
        from model_store import NotFound

        try:
            artifact = self.store.load_version(model, version)
        except NotFound as exc:
            raise UnknownVersion(str(exc)) from exc
        except Exception as exc:
            raise VersionUnavailable(
                f"version {version!r} of {model!r} cannot be loaded: {exc}"
            ) from exc
        try:
            compiled = self._compile(artifact.spec, artifact.coefficients)
        except Exception as exc:
            raise VersionUnavailable(
                f"version {version!r} of {model!r} does not compile: {exc}"
            ) from exc
        return LoadedModel(
            name=model,
            version=version,
            compiled=compiled,
            spec=artifact.spec,
            coefficients=artifact.coefficients,
            manifest=getattr(artifact, "manifest", None),
        )

    def _evict(self) -> None:
        if len(self._cache) < self._cache_size:
            return
        routed = {
            (m, v)
            for m, r in self.snapshot.routes.items()
            for v in (*r.live, *((r.shadow,) if r.shadow else ()))
        }
        for key in [k for k in self._cache if k not in routed][: len(self._cache) // 2 or 1]:
            del self._cache[key]

    # -- routing -------------------------------------------------------------------------

    def routing(self, model: str) -> ModelRouting | None:
        return self.snapshot.routes.get(model)

    def refresh(self) -> Snapshot:
        """Poll the store once and swap in the new snapshot (last good state kept per model)."""
        with self._refresh_lock:
            old = self.snapshot
            try:
                self.store.check()
                # One listing gives every model and its routing generation (a cheap poll).
                generations = {str(m): int(g) for m, g in self.store.generations().items()}
            except Exception as exc:
                log.warning("store unreachable: %s", exc)
                self.snapshot = Snapshot(
                    routes=old.routes,
                    models=old.models,
                    problems=(f"store unreachable: {exc}",),
                    refreshed_at=old.refreshed_at,
                )
                metrics.DEGRADED.set(1)
                return self.snapshot
            names = tuple(sorted(generations))
            routes: dict[str, ModelRouting] = {}
            problems: list[str] = []
            for name in names:
                previous = old.routes.get(name)
                if previous is not None and previous.generation == generations[name]:
                    routes[name] = previous
                    continue
                if previous is not None and generations[name] < previous.generation:
                    # The history is append-only: an older generation means lost records (a
                    # store restored from an older copy). Keep the newest state seen.
                    problems.append(
                        f"{name}: the store lists routing generation {generations[name]}, "
                        f"older than generation {previous.generation} served here; serving that"
                    )
                    routes[name] = previous
                    continue
                if generations[name] == 0:
                    continue
                try:
                    state = self.store.get_routing(name)
                except Exception as exc:
                    problems.append(f"{name}: routing cannot be read: {exc}")
                    if name in old.routes:
                        routes[name] = old.routes[name]
                    continue
                if state is None or not getattr(state, "live", None):
                    continue
                new = _routing_of(state)
                failed = self._load_all(name, new, problems)
                if failed & set(new.live):
                    if name in old.routes:
                        routes[name] = old.routes[name]
                        continue
                    # Nothing served here yet (a new worker): the newest older generation
                    # whose live versions all load, as an older worker still serves it.
                    fallback = self._last_loading(name, new.generation, problems)
                    if fallback is None:
                        continue
                    new, failed = fallback
                if new.shadow in failed:
                    new = ModelRouting(new.generation, new.live, None)
                routes[name] = new
                metrics.child(metrics.ROUTING_GENERATION, name).set(new.generation)
            for name in sorted(set(old.routes) - set(names)):
                # A routed model missing from the listing: keep serving it, report it.
                problems.append(f"{name}: no longer listed by the store; serving the last state")
                routes[name] = old.routes[name]
                names = (*names, name)
            self.snapshot = Snapshot(
                routes=routes, models=names, problems=tuple(problems), refreshed_at=time.time()
            )
            metrics.DEGRADED.set(1 if problems else 0)
            return self.snapshot

    def _last_loading(
        self, name: str, newest: int, problems: list[str]
    ) -> tuple[ModelRouting, set[str]] | None:
        """The newest routing record older than ``newest`` whose live versions all load (at
        most :data:`FALLBACK_GENERATIONS` back), with the versions that failed to load."""
        for generation in range(newest - 1, max(0, newest - 1 - FALLBACK_GENERATIONS), -1):
            try:
                routing = _routing_of(self.store.get_routing(name, generation))
            except Exception as exc:
                problems.append(f"{name}: routing generation {generation} cannot be read: {exc}")
                return None
            if not routing.live:
                continue
            failed = self._load_all(name, routing, [])
            if not failed & set(routing.live):
                problems.append(
                    f"{name}: routing generation {newest} names a version that does not load; "
                    f"serving generation {generation}"
                )
                return routing, failed
        return None

    def _load_all(self, name: str, routing: ModelRouting, problems: list[str]) -> set[str]:
        failed: set[str] = set()
        for version in (*routing.live, *((routing.shadow,) if routing.shadow else ())):
            try:
                self.get(name, version)
            except (UnknownVersion, VersionUnavailable) as exc:
                log.warning("not routing %s: %s", name, exc)
                problems.append(f"{name}: {exc}")
                failed.add(version)
        return failed

    # -- the poller ----------------------------------------------------------------------

    def ensure_poller(self) -> None:
        """Start the poller thread in this process (again after a fork), if polling is on."""
        if self.poll_seconds <= 0 or self._poller_pid == os.getpid():
            return
        self._poller_pid = os.getpid()
        self._stop = threading.Event()
        thread = threading.Thread(target=self._poll_loop, name="choicecast-poller", daemon=True)
        thread.start()

    def stop(self) -> None:
        self._stop.set()

    def _poll_loop(self) -> None:
        stop = self._stop
        while not stop.wait(self.poll_seconds):
            try:
                self.refresh()
            except Exception:  # keep polling whatever happens; the snapshot stays as it was
                log.exception("routing poll failed")
