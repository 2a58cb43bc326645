"""deploy/k8s/: valid against the Kubernetes schemas and shaped as the production set-up needs.

Schemas: kubernetes-validate ships the OpenAPI-derived JSON schemas of each Kubernetes release
offline; strict mode also rejects unknown fields (a misspelt key would otherwise be ignored by
the API server). The properties checked below are common practice for a stateless HTTP
service (Kubernetes documentation: probes, rolling updates, disruption budgets, autoscaling,
pod security standard "restricted").
"""

from __future__ import annotations

import copy
import dataclasses
import re
import runpy
from pathlib import Path

import kubernetes_validate
import pytest
import yaml
from containerfile_reader import CONTAINERFILE, REPO, exec_form, instructions
from k8s_manifests import KUSTOMIZATION, by_kind, documents, manifest_files, one

# Oldest Kubernetes release the manifests target, and the newest whose schemas are bundled.
KUBERNETES_VERSIONS = ("1.31.0", "1.37.0")
# Variables the service reads that hold secrets: never in the ConfigMap, always from a Secret.
SECRET_VARIABLES = {"CHOICECAST_SCORE_TOKENS", "CHOICECAST_ADMIN_TOKENS"}
# Set elsewhere than the ConfigMap: the tokens file beside the volume it points into (the
# Deployment), the bind and worker count by the container arguments, the gunicorn config
# path by the image.
DEPLOYMENT_VARIABLES = {
    "CHOICECAST_TOKENS_FILE",
    # Internal: `choicecast serve` sets it for gunicorn's exit hook; nobody else should.
    "CHOICECAST_OWNED_METRICS_DIR",
    "CHOICECAST_HOST",
    "CHOICECAST_PORT",
    "CHOICECAST_WORKERS",
    "CHOICECAST_GUNICORN_CONFIG",
}
# Standard AWS SDK variables (boto3 documentation) the S3 backend honours.
AWS_VARIABLES = {"AWS_DEFAULT_REGION", "AWS_REGION", "AWS_ACCESS_KEY_ID", "AWS_SECRET_ACCESS_KEY"}
AWS_SECRET_VARIABLES = {"AWS_ACCESS_KEY_ID", "AWS_SECRET_ACCESS_KEY", "AWS_SESSION_TOKEN"}


def _deployment_pod() -> dict:
    return one("Deployment")["spec"]["template"]


def _container() -> dict:
    containers = _deployment_pod()["spec"]["containers"]
    assert len(containers) == 1
    return containers[0]


def service_variables(with_cli: bool = False) -> set[str]:
    """Every environment variable the service and store read: one per field of the settings
    (``CHOICECAST_<FIELD>``) plus the names spelt out in the code. The ops command's own
    variables (service/cli.py, e.g. who makes a change) only with ``with_cli``."""
    from service.api.config import ENV_PREFIX, Settings

    found = {ENV_PREFIX + field.name.upper() for field in dataclasses.fields(Settings)}
    pattern = re.compile(r"\bCHOICECAST_[A-Z0-9_]+\b")
    for folder in ("service", "model_store"):
        for path in (REPO / folder).rglob("*.py"):
            if with_cli or path.name != "cli.py":
                found.update(pattern.findall(path.read_text()))
    return found


@pytest.mark.parametrize("version", KUBERNETES_VERSIONS)
@pytest.mark.parametrize("path", manifest_files(), ids=lambda p: p.name)
def test_manifest_is_valid_against_the_kubernetes_schema(path: Path, version: str) -> None:
    docs = documents(path)
    assert docs, f"{path.name} holds no resource"
    for doc in docs:
        kubernetes_validate.validate(doc, version, strict=True)


def test_schema_validation_rejects_a_broken_manifest() -> None:
    # Control: an unknown field and a wrongly typed value are refused.
    broken = copy.deepcopy(one("Deployment"))
    broken["spec"]["template"]["spec"]["containers"][0]["readinessProbe"]["httpGett"] = {}
    with pytest.raises(kubernetes_validate.ValidationError):
        kubernetes_validate.validate(broken, KUBERNETES_VERSIONS[0], strict=True)
    broken = copy.deepcopy(one("Deployment"))
    broken["spec"]["replicas"] = "two"
    with pytest.raises(kubernetes_validate.ValidationError):
        kubernetes_validate.validate(broken, KUBERNETES_VERSIONS[0], strict=True)


def test_kustomization_lists_every_manifest() -> None:
    listed = yaml.safe_load(KUSTOMIZATION.read_text())["resources"]
    assert sorted(listed) == sorted(p.name for p in manifest_files())


def test_the_expected_resources_are_present() -> None:
    kinds = by_kind()
    for kind in (
        "Deployment",
        "Service",
        "HorizontalPodAutoscaler",
        "PodDisruptionBudget",
        "ConfigMap",
        "ServiceAccount",
    ):
        assert len(kinds.get(kind, [])) == 1, kind


def test_probes_use_readyz_and_livez_on_the_serving_port() -> None:
    container = _container()
    ports = {p["name"]: p["containerPort"] for p in container["ports"]}
    assert container["readinessProbe"]["httpGet"]["path"] == "/readyz"
    assert container["livenessProbe"]["httpGet"]["path"] == "/livez"
    assert container["startupProbe"]["httpGet"]["path"] == "/livez"
    for probe in ("readinessProbe", "livenessProbe", "startupProbe"):
        assert container[probe]["httpGet"]["port"] in ports
    # A degraded pod (store unreachable) must leave the endpoints long before liveness would
    # restart a healthy process: readiness reacts faster than liveness.
    ready, live = container["readinessProbe"], container["livenessProbe"]
    assert (
        ready["periodSeconds"] * ready["failureThreshold"]
        < live["periodSeconds"] * live["failureThreshold"]
    )


def test_container_matches_the_image() -> None:
    container = _container()
    steps = instructions(CONTAINERFILE.read_text())
    final = [s for s in steps if s.stage == max(t.stage for t in steps)]
    image_args = exec_form(next(s.argument for s in final if s.keyword == "CMD"))
    exposed = int(next(s.argument for s in final if s.keyword == "EXPOSE"))
    user = next(s.argument for s in reversed(final) if s.keyword == "USER")
    assert "command" not in container, "the image's ENTRYPOINT (choicecast serve) must be used"
    assert container["args"] == image_args
    assert [p["containerPort"] for p in container["ports"]] == [exposed]
    pod_security = _deployment_pod()["spec"]["securityContext"]
    assert f"{pod_security['runAsUser']}:{pod_security['runAsGroup']}" == user


def test_resources_are_requested_and_limited() -> None:
    resources = _container()["resources"]
    for part in ("requests", "limits"):
        for name in ("cpu", "memory"):
            assert name in resources[part], f"{part}.{name} missing"
    # The gunicorn configuration is sized for a 2-core pod.
    assert str(resources["requests"]["cpu"]) == "2"


def test_security_context_is_restricted() -> None:
    pod = _deployment_pod()["spec"]
    assert pod["securityContext"]["runAsNonRoot"] is True
    assert pod["securityContext"]["runAsUser"] > 0
    assert pod["securityContext"]["seccompProfile"]["type"] == "RuntimeDefault"
    assert pod["automountServiceAccountToken"] is False
    context = _container()["securityContext"]
    assert context["runAsNonRoot"] is True
    assert context["readOnlyRootFilesystem"] is True
    assert context["allowPrivilegeEscalation"] is False
    assert context.get("privileged", False) is False
    assert context["capabilities"]["drop"] == ["ALL"]
    assert "add" not in context["capabilities"]
    # A read-only root needs a writable scratch directory for gunicorn and metrics.
    mounts = {m["mountPath"]: m["name"] for m in _container()["volumeMounts"]}
    volumes = {v["name"]: v for v in pod["volumes"]}
    assert "emptyDir" in volumes[mounts["/tmp"]]


def test_rolling_update_never_lowers_ready_capacity() -> None:
    spec = one("Deployment")["spec"]
    rolling = spec["strategy"]["rollingUpdate"]
    assert spec["strategy"]["type"] == "RollingUpdate"
    assert rolling["maxUnavailable"] == 0
    assert rolling["maxSurge"] not in (0, "0%")
    assert spec["minReadySeconds"] > 0


def test_graceful_shutdown_fits_the_termination_grace_period() -> None:
    pod = _deployment_pod()["spec"]
    pre_stop = _container()["lifecycle"]["preStop"]["exec"]["command"]
    assert pre_stop[0] == "sleep"
    gunicorn_conf = REPO / "deploy" / "gunicorn.conf.py"
    assert gunicorn_conf.exists(), "deploy/gunicorn.conf.py is missing"
    graceful = float(runpy.run_path(str(gunicorn_conf)).get("graceful_timeout", 30))
    assert float(pre_stop[1]) + graceful < pod["terminationGracePeriodSeconds"]


def test_service_selects_the_pods_by_port_name() -> None:
    service = one("Service")
    labels = _deployment_pod()["metadata"]["labels"]
    assert service["spec"]["selector"].items() <= labels.items()
    names = {p["name"] for p in _container()["ports"]}
    assert {p["targetPort"] for p in service["spec"]["ports"]} <= names


def test_disruption_budget_and_autoscaler_fit_together() -> None:
    labels = _deployment_pod()["metadata"]["labels"]
    pdb = one("PodDisruptionBudget")["spec"]
    hpa = one("HorizontalPodAutoscaler")["spec"]
    deployment = one("Deployment")
    assert pdb["selector"]["matchLabels"].items() <= labels.items()
    assert hpa["scaleTargetRef"] == {
        "apiVersion": "apps/v1",
        "kind": "Deployment",
        "name": deployment["metadata"]["name"],
    }
    assert hpa["minReplicas"] >= 2 and hpa["maxReplicas"] > hpa["minReplicas"]
    # At the autoscaler's floor a drain still leaves at least one ready replica.
    assert hpa["minReplicas"] - pdb["maxUnavailable"] >= 1
    assert deployment["spec"]["replicas"] == hpa["minReplicas"]
    cpu = [m for m in hpa["metrics"] if m["resource"]["name"] == "cpu"]
    assert cpu and 0 < cpu[0]["resource"]["target"]["averageUtilization"] < 100


def test_configmap_holds_every_non_secret_setting_and_nothing_else() -> None:
    keys = set(one("ConfigMap")["data"])
    known = service_variables()
    assert "CHOICECAST_STORE" in known, "the service reads no CHOICECAST_STORE"
    assert keys <= known | AWS_VARIABLES, f"unknown keys {sorted(keys - known - AWS_VARIABLES)}"
    # A complete reference in the operators' hands: every setting appears, secrets excepted.
    missing = known - keys - SECRET_VARIABLES - DEPLOYMENT_VARIABLES
    assert not missing, f"settings missing from the ConfigMap: {sorted(missing)}"
    assert not keys & (SECRET_VARIABLES | AWS_SECRET_VARIABLES)
    envfrom = [e["configMapRef"]["name"] for e in _container()["envFrom"]]
    assert envfrom == [one("ConfigMap")["metadata"]["name"]]


def test_configmap_values_are_accepted_by_the_service() -> None:
    from service.api.config import ENV_PREFIX, Settings, load_settings

    data = one("ConfigMap")["data"]
    fields = {field.name for field in dataclasses.fields(Settings)}
    settings = load_settings(
        {k: v for k, v in data.items() if k.removeprefix(ENV_PREFIX).lower() in fields}
    )
    assert settings.store == data["CHOICECAST_STORE"]
    for name in ("CHOICECAST_S3_CONNECT_TIMEOUT", "CHOICECAST_S3_READ_TIMEOUT"):
        assert float(data[name]) > 0


def test_tokens_and_store_credentials_come_from_secrets() -> None:
    pod = _deployment_pod()["spec"]
    env = {e["name"]: e for e in _container()["env"]}
    assert set(env) <= service_variables() | AWS_VARIABLES
    # Store credentials: Secret references, optional so that workload identity works too.
    for name in ("AWS_ACCESS_KEY_ID", "AWS_SECRET_ACCESS_KEY"):
        ref = env[name]["valueFrom"]["secretKeyRef"]
        assert ref["name"] == "choicecast-store-credentials" and ref.get("optional") is True
    # Tokens: a file from a Secret volume, required (no silent start without auth); the
    # variables that would carry tokens in plain text are not set at all.
    assert not SECRET_VARIABLES & set(env)
    tokens_file = Path(env["CHOICECAST_TOKENS_FILE"]["value"])
    mounts = {m["mountPath"]: m for m in _container()["volumeMounts"]}
    mount = mounts[str(tokens_file.parent)]
    assert mount["readOnly"] is True
    volume = next(v for v in pod["volumes"] if v["name"] == mount["name"])
    assert volume["secret"]["secretName"] == "choicecast-tokens"
    assert not volume["secret"].get("optional", False)
    assert [i["path"] for i in volume["secret"]["items"]] == [tokens_file.name]
    for entry in env.values():
        if entry["name"] in AWS_SECRET_VARIABLES:
            assert "value" not in entry


def test_every_variable_is_in_the_configuration_reference() -> None:
    reference = (REPO / "docs" / "production.md").read_text()
    section = reference.split("## Configuration reference", 1)[1].split("\n## ", 1)[0]
    documented = set(re.findall(r"`([A-Z][A-Z0-9_]+)`", section))
    missing = (service_variables(with_cli=True) | AWS_VARIABLES) - documented
    assert not missing, f"not in docs/production.md: {sorted(missing)}"
    for key in one("ConfigMap")["data"]:
        assert key in documented, key


def test_no_secret_values_in_the_repository_deploy_files() -> None:
    assert "Secret" not in by_kind(), "Secrets are created out of band, never committed"
    # Patterns of real credentials: AWS access key ids and PEM private keys (common practice
    # in secret scanners), and any `*_KEY`/`*TOKEN*` assigned a literal value.
    patterns = [
        re.compile(r"\bAKIA[0-9A-Z]{16}\b"),
        re.compile(r"-----BEGIN [A-Z ]*PRIVATE KEY-----"),
        re.compile(r"(SECRET_ACCESS_KEY|_TOKENS?)\s*[:=]\s*['\"]?[A-Za-z0-9/+]{16,}"),
    ]
    files = [*manifest_files(), CONTAINERFILE, REPO / ".dockerignore"]
    files += [REPO / "docs" / "production.md", REPO / "deploy" / "README.md"]
    for path in files:
        if not path.exists():
            continue
        text = path.read_text()
        for pattern in patterns:
            assert not pattern.search(text), f"{path.name}: {pattern.pattern}"
