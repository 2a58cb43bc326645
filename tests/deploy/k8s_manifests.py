"""Load the Kubernetes manifests in deploy/k8s/ by kind."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import yaml

REPO = Path(__file__).resolve().parents[2]
K8S = REPO / "deploy" / "k8s"
KUSTOMIZATION = K8S / "kustomization.yaml"


def manifest_files() -> list[Path]:
    """Every resource file (the kustomization is a build file, not a resource)."""
    return sorted(p for p in K8S.glob("*.yaml") if p != KUSTOMIZATION)


def documents(path: Path) -> list[dict[str, Any]]:
    """The YAML documents of one file, empty documents dropped."""
    return [doc for doc in yaml.safe_load_all(path.read_text()) if doc]


def by_kind() -> dict[str, list[dict[str, Any]]]:
    """All resources grouped by `kind`."""
    kinds: dict[str, list[dict[str, Any]]] = {}
    for path in manifest_files():
        for doc in documents(path):
            kinds.setdefault(doc["kind"], []).append(doc)
    return kinds


def one(kind: str) -> dict[str, Any]:
    """The single resource of a kind (fails if there is not exactly one)."""
    found = by_kind().get(kind, [])
    assert len(found) == 1, f"expected one {kind}, found {len(found)}"
    return found[0]
