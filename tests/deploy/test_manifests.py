"""The deployment files say what the README says: schema-valid Kubernetes objects whose probes,
selectors and user fit together, a compose file of PostgreSQL and two replicas behind the proxy, an
image that runs as a non-root user from wheels, and a systemd unit that makes its own directories."""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import kubernetes_validate
import pytest
import yaml

DEPLOY = Path(__file__).resolve().parents[2] / "deploy"
ROOT = DEPLOY.parent
K8S_VERSION = "1.30.0"  # the oldest Kubernetes minor still supported upstream when this was written (from memory)


def _objects() -> list[tuple[str, dict[str, Any]]]:
    found = []
    for path in sorted((DEPLOY / "k8s").glob("*.yaml")):
        for doc in yaml.safe_load_all(path.read_text("utf-8")):
            if doc is not None:
                found.append((path.name, doc))
    return found


def _one(kind: str) -> dict[str, Any]:
    (obj,) = [o for _, o in _objects() if o["kind"] == kind]
    return obj


def _api_container() -> dict[str, Any]:
    (container,) = _one("Deployment")["spec"]["template"]["spec"]["containers"]
    return container


@pytest.mark.parametrize(("name", "obj"), _objects(), ids=lambda v: v if isinstance(v, str) else v["kind"])
def test_every_manifest_passes_the_kubernetes_schema_strictly(name: str, obj: dict[str, Any]) -> None:
    # strict: a misspelt field (say `readinesProbe`) is an error, not silently ignored by the cluster.
    kubernetes_validate.validate(obj, K8S_VERSION, strict=True)


def test_the_schema_check_catches_a_misspelt_field() -> None:
    broken = _one("Deployment")
    broken["spec"]["template"]["spec"]["containers"][0]["readinesProbe"] = {"httpGet": {"path": "/readyz"}}
    with pytest.raises(kubernetes_validate.ValidationError):
        kubernetes_validate.validate(broken, K8S_VERSION, strict=True)


def test_the_manifests_hold_a_deployment_service_and_disruption_budget() -> None:
    kinds = {o["kind"] for _, o in _objects()}
    assert {"Deployment", "Service", "PodDisruptionBudget", "ConfigMap", "Secret"} <= kinds


def test_readiness_is_the_database_probe_and_liveness_the_process_probe() -> None:
    container = _api_container()
    assert container["readinessProbe"]["httpGet"]["path"] == "/readyz"
    assert container["livenessProbe"]["httpGet"]["path"] == "/healthz"
    port_names = {p["name"] for p in container["ports"]}
    assert container["readinessProbe"]["httpGet"]["port"] in port_names
    assert container["livenessProbe"]["httpGet"]["port"] in port_names


def test_the_service_and_budget_select_the_deployments_pods() -> None:
    pod_labels = _one("Deployment")["spec"]["template"]["metadata"]["labels"]
    for selector in (_one("Service")["spec"]["selector"],
                     _one("PodDisruptionBudget")["spec"]["selector"]["matchLabels"]):
        assert selector.items() <= pod_labels.items()
    # The migration Job's pods must not receive traffic.
    job_labels = _one("Job")["spec"]["template"]["metadata"]["labels"]
    assert not _one("Service")["spec"]["selector"].items() <= job_labels.items()


def test_the_budget_leaves_a_replica_through_a_drain() -> None:
    replicas = _one("Deployment")["spec"]["replicas"]
    assert replicas >= 2
    assert 1 <= _one("PodDisruptionBudget")["spec"]["minAvailable"] < replicas


def test_the_pods_run_as_the_images_non_root_user_and_read_settings_from_refs() -> None:
    spec = _one("Deployment")["spec"]["template"]["spec"]
    assert spec["securityContext"]["runAsNonRoot"] is True
    assert spec["securityContext"]["runAsUser"] == _image_uid()
    refs = {next(iter(r)) : next(iter(r.values()))["name"] for r in _api_container()["envFrom"]}
    assert refs == {"configMapRef": _one("ConfigMap")["metadata"]["name"],
                    "secretRef": _one("Secret")["metadata"]["name"]}


def test_the_base_url_is_configured_wherever_the_service_listens_on_every_interface() -> None:
    assert "--host" in _api_container()["command"] and "0.0.0.0" in _api_container()["command"]
    assert _one("ConfigMap")["data"]["LYTESTREAM_BASE_URL"].startswith("https://")
    for name in ("lytestream-1", "lytestream-2"):
        assert "LYTESTREAM_BASE_URL" in _compose()["services"][name]["environment"]
    assert "LYTESTREAM_BASE_URL" in (DEPLOY / "lytestream.env.example").read_text("utf-8")


def _compose() -> dict[str, Any]:
    loaded: dict[str, Any] = yaml.safe_load((DEPLOY / "compose.yaml").read_text("utf-8"))
    return loaded


def _compose_errors(doc: dict[str, Any]) -> list[str]:
    """What the Compose Specification's schema (as vendored by check-jsonschema, read offline) finds."""
    import json
    from importlib import resources

    import jsonschema

    schema = json.loads(resources.files("check_jsonschema.builtin_schemas.vendor")
                        .joinpath("compose-spec.json").read_text("utf-8"))
    return [e.message for e in jsonschema.validators.validator_for(schema)(schema).iter_errors(doc)]


def test_the_compose_file_passes_the_compose_specification_schema() -> None:
    assert _compose_errors(_compose()) == []


def test_the_compose_schema_check_catches_a_misspelt_field() -> None:
    broken = _compose()
    broken["services"]["proxy"]["helthcheck"] = broken["services"]["proxy"].pop("healthcheck")
    assert any("helthcheck" in e for e in _compose_errors(broken))


def test_compose_runs_postgres_two_replicas_and_the_proxy_with_healthchecks() -> None:
    services = _compose()["services"]
    assert {"postgres", "migrate", "lytestream-1", "lytestream-2", "proxy"} == set(services)
    for name in ("postgres", "lytestream-1", "lytestream-2", "proxy"):
        assert services[name]["healthcheck"]["test"], f"{name} has no healthcheck"
    for name in ("lytestream-1", "lytestream-2"):
        replica = services[name]
        assert replica["environment"]["LYTESTREAM_DATABASE_URL"].startswith("postgresql+psycopg://")
        assert "@postgres:5432/" in replica["environment"]["LYTESTREAM_DATABASE_URL"]
        assert replica["depends_on"]["migrate"]["condition"] == "service_completed_successfully"
        assert "/readyz" in " ".join(replica["healthcheck"]["test"])
    assert services["migrate"]["command"] == ["lytestream", "db", "upgrade"]
    assert list(_compose()["services"]["proxy"]["depends_on"]) == ["lytestream-1", "lytestream-2"]
    # Only the proxy is reachable from outside.
    assert [n for n, s in services.items() if s.get("ports")] == ["proxy"]


def test_the_proxy_balances_over_exactly_the_compose_replicas() -> None:
    conf = (DEPLOY / "nginx.conf").read_text("utf-8")
    upstream = re.search(r"upstream lytestream \{(.*?)\}", conf, re.S)
    assert upstream is not None
    servers = re.findall(r"server ([\w-]+):8080", upstream.group(1))
    assert servers == ["lytestream-1", "lytestream-2"]
    mount = _compose()["services"]["proxy"]["volumes"][0]
    assert mount.startswith("./nginx.conf:")


def _image_uid() -> int:
    user = re.search(r"^USER (\d+)", (ROOT / "Dockerfile").read_text("utf-8"), re.M)
    assert user is not None, "the image names no numeric USER"
    return int(user.group(1))


def test_the_image_runs_as_a_non_root_user_and_installs_only_from_wheels() -> None:
    dockerfile = (ROOT / "Dockerfile").read_text("utf-8")
    assert _image_uid() != 0
    assert re.search(r"^ARG BASE=python:3\.11-slim$", dockerfile, re.M)
    assert dockerfile.count("FROM ${BASE}") == 2  # builder and runtime on the same base
    (install,) = [line for line in dockerfile.splitlines() if "pip install" in line]
    assert "--no-index" in install and "--find-links /wheels" in install


def test_the_build_context_is_the_wheels_alone() -> None:
    lines = [line for line in (ROOT / ".dockerignore").read_text("utf-8").splitlines()
             if line and not line.startswith("#")]
    assert lines == ["*", "!wheels/*.whl"]


def test_the_systemd_unit_names_its_user_and_makes_its_directories() -> None:
    unit = dict(line.split("=", 1) for line in (DEPLOY / "lytestream.service").read_text("utf-8").splitlines()
                if "=" in line and not line.startswith("#"))
    assert unit["User"] == "lytestream" and unit["Group"] == "lytestream"
    assert unit["StateDirectory"] == "lytestream" and unit["RuntimeDirectory"] == "lytestream"
    assert unit["Environment"] == "LYTESTREAM_DATA_DIR=/var/lib/lytestream"
    # The venv the README's "Running in production" makes is the one the unit starts.
    assert unit["ExecStart"].startswith("/opt/lytestream/bin/lytestream serve")
    assert "python3.11 -m venv /opt/lytestream" in (ROOT / "README.md").read_text("utf-8")
