"""The store: publishing and loading immutable versions, and the routing state of each model.

Safe to use from several threads and processes at once: nothing is cached, every write is a
whole object and create-if-absent on the backend (a version's manifest, a routing record, and
data files under names that carry their content), so nothing written is ever replaced.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from model_store import artifact, routing
from model_store.artifact import COEFFICIENTS, COVARIANCE, MANIFEST, FileFormatError
from model_store.backends.base import Backend, KeyExists, KeyMissing
from model_store.errors import (
    ArtifactError,
    NotFound,
    RoutingConflict,
    RoutingError,
    StoreError,
    StoreUnavailable,
    VersionExists,
)
from model_store.routing import KEEP_SHADOW, Keep, RoutingState
from service.choice.spec import (
    NAME_PATTERN,
    Coefficients,
    ModelSpec,
    SpecError,
    spec_from_dict,
    spec_to_dict,
    validate_model,
)


@dataclass(frozen=True)
class LoadedVersion:
    """A verified version: its spec, its coefficients and its manifest (a plain dict)."""

    spec: ModelSpec
    coefficients: Coefficients
    manifest: Mapping[str, Any]

    @property
    def model(self) -> str:
        return self.manifest["model"]

    @property
    def version(self) -> str:
        return self.manifest["version"]


def natural_key(name: str) -> tuple[Any, ...]:
    """Sort key putting v2 before v10 (digits compare as numbers)."""
    return tuple(int(p) if p.isdigit() else p for p in re.split(r"(\d+)", name))


def check_name(kind: str, name: str) -> None:
    if not isinstance(name, str) or not NAME_PATTERN.match(name):
        raise StoreError(
            f"{kind}: {name!r} is not a valid name (1-64 letters, digits, '_', '.', '-', "
            "starting with a letter or '_')"
        )


def _version_prefix(model: str, version: str) -> str:
    return f"models/{model}/versions/{version}/"


def _check_round_trip(blobs: Mapping[str, bytes], coefficients: Coefficients) -> None:
    """Decode the files about to be written and compare with the values (before any write)."""
    names, est, se = artifact.read_coefficients(blobs[COEFFICIENTS])
    same = names == coefficients.names and np.array_equal(est, coefficients.estimates)
    if coefficients.std_errors is not None:
        same = (
            same and se is not None and np.array_equal(se, coefficients.std_errors, equal_nan=True)
        )
    if COVARIANCE in blobs:
        cov = artifact.read_covariance(blobs[COVARIANCE], names)
        same = same and np.array_equal(cov, coefficients.covariance)
    if not same:
        raise StoreError("internal: the encoded coefficient files do not decode to the values")


class Store:
    """One store, on any backend. See docs/artifact-format.md for the layout."""

    def __init__(self, backend: Backend):
        self.backend = backend

    @property
    def uri(self) -> str:
        return self.backend.uri

    def check(self) -> None:
        """Raise :class:`~model_store.errors.StoreUnavailable` unless the store answers."""
        self.backend.check()

    # -- versions -----------------------------------------------------------------------

    def list_models(self) -> list[str]:
        """Models with at least one published version, sorted."""
        models = set()
        for key in self.backend.list("models/"):
            parts = key.split("/")
            if len(parts) == 5 and parts[2] == "versions" and parts[4] == MANIFEST:
                models.add(parts[1])
        return sorted(models, key=natural_key)

    def list_versions(self, model: str) -> list[str]:
        """Published versions of ``model`` (those whose manifest exists), in natural order.

        Leftovers of an interrupted publish (files without a manifest) are not listed.
        """
        check_name("model", model)
        versions = []
        for key in self.backend.list(f"models/{model}/versions/"):
            parts = key.split("/")
            if len(parts) == 5 and parts[4] == MANIFEST:
                versions.append(parts[3])
        return sorted(versions, key=natural_key)

    def read_manifest(self, model: str, version: str) -> dict[str, Any]:
        """The manifest of a published version (envelope checked, files not verified)."""
        check_name("model", model)
        check_name("version", version)
        try:
            data = self.backend.get(_version_prefix(model, version) + MANIFEST)
        except KeyMissing:
            if model not in self.list_models():
                raise NotFound(f"model {model!r} not found in {self.uri}") from None
            raise NotFound(f"version {version!r} of model {model!r} not found") from None
        try:
            manifest = artifact.parse_manifest(data)
        except FileFormatError as exc:
            raise ArtifactError(model, version, exc.file, str(exc)) from None
        if manifest["model"] != model or manifest["version"] != version:
            raise ArtifactError(
                model, version, MANIFEST, "names a different model or version than its location"
            )
        return manifest

    def stored_key(self, model: str, version: str, file: str) -> str:
        """The key holding ``file`` (e.g. ``coefficients.parquet``) of a published version."""
        manifest = self.read_manifest(model, version)
        stored = artifact.stored_names(manifest)
        if file not in stored:
            raise NotFound(f"version {version!r} of model {model!r} has no file {file!r}")
        return _version_prefix(model, version) + stored[file]

    def load_version(self, model: str, version: str) -> LoadedVersion:
        """Load a version, verifying format version, every checksum and the model itself.

        Raises :class:`NotFound` or :class:`ArtifactError` (naming the file at fault).
        """
        manifest = self.read_manifest(model, version)
        prefix = _version_prefix(model, version)
        stored = artifact.stored_names(manifest)
        blobs: dict[str, bytes] = {}
        for name, digest in manifest["files"].items():
            try:
                data = self.backend.get(prefix + stored[name])
            except KeyMissing:
                where = "" if stored[name] == name else f" (stored as {stored[name]})"
                raise ArtifactError(model, version, name, f"missing{where}") from None
            if artifact.sha256(data) != digest:
                raise ArtifactError(
                    model, version, name, "checksum mismatch (the file was changed or truncated)"
                )
            blobs[name] = data
        try:
            names, est, se = artifact.read_coefficients(blobs[COEFFICIENTS])
            cov = (
                artifact.read_covariance(blobs[COVARIANCE], names) if COVARIANCE in blobs else None
            )
        except FileFormatError as exc:
            raise ArtifactError(model, version, exc.file, str(exc)) from None
        try:
            spec = spec_from_dict(manifest["spec"])
            coefficients = Coefficients(names=names, estimates=est, std_errors=se, covariance=cov)
            validate_model(spec, coefficients)
        except SpecError as exc:
            raise ArtifactError(model, version, MANIFEST, f"invalid model: {exc}") from None
        if manifest["family"] != spec.family:
            raise ArtifactError(model, version, MANIFEST, "family differs from the spec's")
        return LoadedVersion(spec=spec, coefficients=coefficients, manifest=manifest)

    def publish(
        self,
        model: str,
        version: str,
        spec: ModelSpec,
        coefficients: Coefficients,
        *,
        published_by: str,
        estimation: Mapping[str, Any] | None = None,
        parent: str | None = None,
        calibration: Mapping[str, Any] | None = None,
    ) -> dict[str, Any]:
        """Validate and write a new version; returns its manifest.

        Data files first, under names that carry their content (so two publishes of one id
        never write the same key with different bytes), then the manifest, create-if-absent:
        the single commit point. A publish interrupted at any point, or beaten to the manifest,
        leaves no visible version; its data files are unlisted orphans that block nothing.
        Raises :class:`SpecError` (invalid model), :class:`VersionExists` (never overwrites).
        """
        check_name("model", model)
        check_name("version", version)
        if spec.name != model:
            raise StoreError(f"model: the spec is named {spec.name!r}, not {model!r}")
        validate_model(spec, coefficients)
        estimation = artifact.check_estimation(estimation)
        if parent is not None and parent not in self.list_versions(model):
            raise NotFound(f"parent: version {parent!r} of model {model!r} not found")
        prefix = _version_prefix(model, version)
        if self.backend.exists(prefix + MANIFEST):
            raise VersionExists(f"version {version!r} of model {model!r} is already published")
        blobs = {COEFFICIENTS: artifact.coefficients_bytes(coefficients)}
        if coefficients.covariance is not None:
            blobs[COVARIANCE] = artifact.covariance_bytes(coefficients)
        _check_round_trip(blobs, coefficients)
        files = {name: artifact.sha256(data) for name, data in blobs.items()}
        stored = {name: artifact.stored_name(name, digest) for name, digest in files.items()}
        for name, data in blobs.items():
            self._write_content(prefix + stored[name], data)
        manifest = artifact.build_manifest(
            model=model,
            version=version,
            spec=spec,
            spec_dict=spec_to_dict(spec),
            files=files,
            stored_as=stored,
            published_by=published_by,
            estimation=estimation,
            parent=parent,
            calibration=calibration,
        )
        try:
            self.backend.put_new(prefix + MANIFEST, artifact.manifest_bytes(manifest))
        except KeyExists:
            raise VersionExists(
                f"version {version!r} of model {model!r} was published meanwhile by someone else"
            ) from None
        self.load_version(model, version)  # read back: refuse to report success unverified
        return manifest

    def _write_content(self, key: str, data: bytes) -> None:
        """Create ``key``, whose name carries the sha256 of ``data``; an existing object there is
        accepted only if it holds the same bytes (a retried or concurrent identical publish)."""
        for _ in range(3):  # an object removed between the two calls is created again
            try:
                self.backend.put_new(key, data)
                return
            except KeyExists:
                pass
            try:
                existing = self.backend.get(key)
            except KeyMissing:
                continue
            if artifact.sha256(existing) == artifact.sha256(data):
                return
            raise StoreError(
                f"{key}: already holds other bytes than its name says; nothing was overwritten"
            )
        raise StoreUnavailable(f"store {self.uri}: {key} keeps appearing and disappearing")

    # -- routing ------------------------------------------------------------------------

    def _generations(self, model: str) -> list[int]:
        gens = (routing.generation_of_key(k) for k in self.backend.list(f"models/{model}/routing/"))
        return sorted(g for g in gens if g is not None)

    def routing_generation(self, model: str) -> int:
        """The current routing generation of ``model`` (0 when never routed): a cheap poll."""
        check_name("model", model)
        gens = self._generations(model)
        return gens[-1] if gens else 0

    def generations(self) -> dict[str, int]:
        """The current routing generation of every model with a version, in one listing."""
        out: dict[str, int] = {}
        for key in self.backend.list("models/"):
            parts = key.split("/")
            if len(parts) == 5 and parts[2] == "versions" and parts[4] == MANIFEST:
                out.setdefault(parts[1], 0)
            elif len(parts) == 4 and parts[2] == "routing":
                gen = routing.generation_of_key(key)
                if gen is not None:
                    out[parts[1]] = max(out.get(parts[1], 0), gen)
        return out

    def _read_state(self, model: str, generation: int) -> RoutingState:
        if generation == 0:
            return routing.empty_state(model)
        try:
            data = self.backend.get(routing.record_key(model, generation))
        except KeyMissing:
            raise RoutingError(f"routing generation {generation} of {model!r} not found") from None
        return routing.decode(model, generation, data)

    def get_routing(self, model: str, generation: int | None = None) -> RoutingState:
        """The current routing state, or the one recorded as ``generation`` (generation 0 is
        the empty state of a model never routed)."""
        if generation is None:
            return self._read_state(model, self.routing_generation(model))
        check_name("model", model)
        if not isinstance(generation, int) or generation < 0:
            raise RoutingError(f"generation: {generation!r} is not a generation number")
        return self._read_state(model, generation)

    def history(self, model: str) -> list[RoutingState]:
        """Every routing change of ``model``, oldest first."""
        check_name("model", model)
        return [self._read_state(model, g) for g in self._generations(model)]

    def change_routing(
        self,
        model: str,
        live: Mapping[str, float],
        shadow: str | Keep | None = KEEP_SHADOW,
        *,
        reason: str,
        changed_by: str,
        expected_generation: int | None = None,
        action: str = "route",
        restored_generation: int | None = None,
    ) -> RoutingState:
        """Record a new routing state; returns it.

        ``shadow``: a version to score alongside, ``None`` for no shadow, or ``KEEP_SHADOW``
        (the default) for the shadow of the state the change is computed from, dropped only
        if the new weights make it the only live version.
        ``expected_generation`` is the generation the change was computed from (default: the
        current one, read now). If another change was recorded since, :class:`RoutingConflict`
        is raised and nothing is written. Every live version and the shadow must load
        (checksums verified), else :class:`RoutingError` / :class:`ArtifactError`.
        """
        check_name("model", model)
        if action not in routing.ACTIONS:
            raise RoutingError(f"action: must be one of {', '.join(routing.ACTIONS)}")
        weights = routing.check_change(live, None if isinstance(shadow, Keep) else shadow, reason)
        current = self.routing_generation(model)
        base = current if expected_generation is None else expected_generation
        if base != current:
            raise RoutingConflict(model, base, current)
        chosen = (
            routing.kept_shadow(self._read_state(model, base), weights)
            if isinstance(shadow, Keep)
            else shadow
        )
        published = set(self.list_versions(model))
        if not published:
            raise NotFound(f"model {model!r} not found in {self.uri}")
        for version in [*weights, *([chosen] if chosen is not None else [])]:
            where = "shadow" if version == chosen and version not in weights else f"live.{version}"
            if version not in published:
                raise RoutingError(f"{where}: version {version!r} of {model!r} is not published")
            try:
                self.load_version(model, version)
            except ArtifactError as exc:
                raise RoutingError(f"{where}: version {version!r} does not load: {exc}") from None
        state = RoutingState(
            model=model,
            generation=base + 1,
            live=weights,
            shadow=chosen,
            previous_generation=base,
            action=action,
            changed_by=changed_by,
            changed_at=artifact.now_iso(),
            reason=reason.strip(),
            restored_generation=restored_generation,
        )
        try:
            self.backend.put_new(routing.record_key(model, state.generation), routing.encode(state))
        except KeyExists:
            raise RoutingConflict(model, base, self.routing_generation(model)) from None
        return state

    def promote(
        self,
        model: str,
        version: str,
        *,
        changed_by: str,
        reason: str | None = None,
        expected_generation: int | None = None,
    ) -> RoutingState:
        """Route 100% of live traffic to ``version``, keeping the shadow (cleared if it is
        ``version``)."""
        return self.change_routing(
            model,
            {version: 1.0},
            KEEP_SHADOW,
            reason=reason or f"promote {version} to 100%",
            changed_by=changed_by,
            expected_generation=expected_generation,
            action="promote",
        )

    def rollback(
        self,
        model: str,
        *,
        changed_by: str,
        reason: str | None = None,
        expected_generation: int | None = None,
    ) -> RoutingState:
        """Record a new generation restoring the state before the current one.

        Rolling back twice in a row therefore undoes the first rollback.
        """
        current = self.get_routing(model)
        if expected_generation is not None and expected_generation != current.generation:
            raise RoutingConflict(model, expected_generation, current.generation)
        if current.generation == 0:
            raise RoutingError(f"{model!r} has never been routed; nothing to roll back")
        previous = self._read_state(model, current.generation - 1)
        if previous.is_empty:
            raise RoutingError(
                f"generation {current.generation} is the first routing of {model!r}; "
                "there is no earlier state to restore"
            )
        return self.change_routing(
            model,
            previous.live,
            previous.shadow,
            reason=reason or f"roll back generation {current.generation}",
            changed_by=changed_by,
            expected_generation=current.generation,
            action="rollback",
            restored_generation=previous.generation,
        )
