"""The deployment recipes agree with the app: probes hit real routes, ports match, commands parse, no secret inlined.

No Docker engine or cluster runs here, so this checks what can be checked
without one: every file parses, and every cross-reference holds.
"""

from __future__ import annotations

import re
import shlex
from pathlib import Path
from typing import Any

import pytest
import yaml

from veil.cli.parser import build_parser
from veil.server.app import create_app
from veil.server.settings import ServiceSettings, load_settings

DEPLOY = Path(__file__).resolve().parent.parent / "deploy"
PORT = 8080
SECRET_WORDS = re.compile(r"TOKEN|SECRET|PASSWORD|KEY", re.IGNORECASE)


def manifests() -> list[dict[str, Any]]:
    documents = []
    for path in sorted((DEPLOY / "k8s").glob("*.yaml")):
        documents += [d for d in yaml.safe_load_all(path.read_text()) if d]
    return documents


def of_kind(kind: str) -> list[dict[str, Any]]:
    return [m for m in manifests() if m["kind"] == kind]


def balanced_service() -> dict[str, Any]:
    """The Service callers reach (one replica per request), not the headless one that names every replica."""
    (service,) = [s for s in of_kind("Service") if s["spec"].get("clusterIP") != "None"]
    return service


def headless_service() -> dict[str, Any]:
    (service,) = [s for s in of_kind("Service") if s["spec"].get("clusterIP") == "None"]
    return service


def app_routes() -> set[str]:
    """Every route the app documents (its OpenAPI paths); building the app loads nothing."""
    return set(create_app(ServiceSettings(registry="/nonexistent")).openapi()["paths"])


def parses_as_veil(argv: list[str]) -> str:
    """The subcommand ``argv`` (starting with ``veil``) runs; argparse exits on anything else."""
    assert argv[0] == "veil"
    return str(build_parser().parse_args(argv[1:]).handler)


def dockerfile() -> str:
    return (DEPLOY / "Dockerfile").read_text()


def test_every_manifest_has_the_kinds_the_cluster_needs() -> None:
    kinds = sorted(m["kind"] for m in manifests())
    expected = [
        "ConfigMap", "CronJob", "Deployment", "HorizontalPodAutoscaler", "Job", "PodDisruptionBudget", "Service",
        "Service",
    ]  # fmt: skip
    assert kinds == expected


def test_probes_point_at_routes_the_app_has_and_ports_match() -> None:
    routes = app_routes()
    (deployment,) = of_kind("Deployment")
    (container,) = deployment["spec"]["template"]["spec"]["containers"]
    ports = {p["name"]: p["containerPort"] for p in container["ports"]}
    assert ports == {"http": PORT}
    assert container["readinessProbe"]["httpGet"]["path"] == "/readyz"
    assert container["livenessProbe"]["httpGet"]["path"] == "/healthz"
    for probe in ("readinessProbe", "livenessProbe"):
        assert container[probe]["httpGet"]["path"] in routes
        assert container[probe]["httpGet"]["port"] in ports
    assert parses_as_veil(container["command"]) == "serve"
    assert container["command"][container["command"].index("--port") + 1] == str(PORT)
    for service in of_kind("Service"):
        assert service["spec"]["ports"][0]["targetPort"] == PORT
    assert deployment["spec"]["template"]["metadata"]["annotations"]["prometheus.io/path"] in routes


def test_selectors_and_targets_line_up() -> None:
    (deployment,) = of_kind("Deployment")
    pod_labels = deployment["spec"]["template"]["metadata"]["labels"]
    assert deployment["spec"]["selector"]["matchLabels"].items() <= pod_labels.items()
    for service in of_kind("Service"):
        assert service["spec"]["selector"].items() <= pod_labels.items()
    (budget,) = of_kind("PodDisruptionBudget")
    assert budget["spec"]["selector"]["matchLabels"].items() <= pod_labels.items()
    (autoscaler,) = of_kind("HorizontalPodAutoscaler")
    target = autoscaler["spec"]["scaleTargetRef"]
    assert (target["kind"], target["name"]) == ("Deployment", deployment["metadata"]["name"])
    assert autoscaler["spec"]["minReplicas"] > budget["spec"]["minAvailable"]


def test_resources_settings_and_the_fit_job() -> None:
    (configmap,) = of_kind("ConfigMap")
    fields = {f"VEIL_{name.upper()}" for name in ServiceSettings.model_fields}
    assert set(configmap["data"]) <= fields, set(configmap["data"]) - fields
    for workload in of_kind("Deployment") + of_kind("Job"):
        for container in workload["spec"]["template"]["spec"]["containers"]:
            assert {"cpu", "memory"} <= container["resources"]["requests"].keys()
            assert {"cpu", "memory"} <= container["resources"]["limits"].keys()
            assert container["envFrom"][0]["configMapRef"]["name"] == configmap["metadata"]["name"]
    (job,) = of_kind("Job")
    (fit,) = job["spec"]["template"]["spec"]["containers"]
    assert parses_as_veil(fit["command"]) == "fit"


def test_the_patrol_cronjob_checks_the_service_once_per_scheduled_slot() -> None:
    (cronjob,) = of_kind("CronJob")
    (configmap,) = of_kind("ConfigMap")
    headless = headless_service()
    spec = cronjob["spec"]
    assert spec["concurrencyPolicy"] == "Forbid"
    (patrol,) = spec["jobTemplate"]["spec"]["template"]["spec"]["containers"]
    assert parses_as_veil(patrol["command"]) == "patrol"
    arguments = build_parser().parse_args(patrol["command"][1:])
    assert arguments.once
    # One record per slot: the slot is the schedule's interval ("*/5": every 300 s), so a retried job adds nothing.
    minutes = int(spec["schedule"].split()[0].removeprefix("*/"))
    assert arguments.every == minutes * 60
    # It finds every replica through the headless Service's name, on the pods' own port (a headless name resolves to
    # the pods, not to a proxy), and the registry through the same settings as the service.
    assert arguments.service == []
    assert arguments.replicas_of == [f"http://{headless['metadata']['name']}:{PORT}"]
    assert headless["spec"]["ports"][0]["port"] == PORT
    assert balanced_service()["spec"]["ports"][0]["port"] == 80
    assert patrol["envFrom"][0]["configMapRef"]["name"] == configmap["metadata"]["name"]
    assert "VEIL_REGISTRY" in configmap["data"]
    assert {"cpu", "memory"} <= patrol["resources"]["limits"].keys()


def test_no_secret_is_inlined_anywhere() -> None:
    assert of_kind("Secret") == []
    for manifest in manifests():
        for container in manifest.get("spec", {}).get("template", {}).get("spec", {}).get("containers", []):
            for variable in container.get("env", []):
                if SECRET_WORDS.search(variable["name"]):
                    assert "value" not in variable, variable
                    assert "secretKeyRef" in variable["valueFrom"]
    (configmap,) = of_kind("ConfigMap")
    assert not any(SECRET_WORDS.search(key) for key in configmap["data"])
    compose = yaml.safe_load((DEPLOY / "compose.yaml").read_text())
    for service in compose["services"].values():
        for name, value in (service.get("environment") or {}).items():
            # A path to where secrets are mounted is fine; a secret's value is not.
            if SECRET_WORDS.search(name) and not name.endswith(("_DIR", "_FILE")):
                pytest.fail(f"compose sets {name}={value!r} inline")
    assert not re.search(r"(?i)(token|secret|password)\s*[=:]\s*\S{8,}", dockerfile())


def test_the_dockerfile_is_slim_non_root_and_healthchecked() -> None:
    text = dockerfile()
    stages = re.split(r"(?m)^FROM ", text)[1:]
    assert len(stages) == 2
    final = stages[-1]
    assert final.startswith("python:3.11-slim")
    assert re.search(r"(?m)^USER 10001$", final)
    assert not re.search(r"apt-get|build-essential|gcc", final)
    assert f"EXPOSE {PORT}" in final
    health = re.search(r"HEALTHCHECK .*?CMD (\[.*?\])$", final, re.DOTALL | re.MULTILINE)
    assert health is not None
    assert f"127.0.0.1:{PORT}/healthz" in health.group(1)
    assert "/healthz" in app_routes()
    entrypoint = yaml.safe_load(re.search(r"(?m)^ENTRYPOINT (.*)$", final).group(1))  # type: ignore[union-attr]
    command = yaml.safe_load(re.search(r"(?m)^CMD (\[.*\])$", final).group(1))  # type: ignore[union-attr]
    assert parses_as_veil(entrypoint + command) == "serve"


def test_compose_proxy_and_prometheus_reach_the_replicas() -> None:
    compose = yaml.safe_load((DEPLOY / "compose.yaml").read_text())
    veil = compose["services"]["veil"]
    assert veil["deploy"]["replicas"] >= 2
    assert parses_as_veil(["veil", *veil["command"]]) == "serve"
    assert veil["expose"] == [str(PORT)]
    assert any(v.startswith("registry:/registry") for v in veil["volumes"])
    assert f"server veil:{PORT}" in (DEPLOY / "nginx.conf").read_text()
    prometheus = yaml.safe_load((DEPLOY / "prometheus.yml").read_text())
    (job,) = prometheus["scrape_configs"]
    assert job["metrics_path"] in app_routes()
    assert job["dns_sd_configs"][0]["port"] == PORT
    # The patrol finds every replica by the service's name, on the port they listen on, and writes the registry.
    patrol = compose["services"]["patrol"]
    arguments = build_parser().parse_args(patrol["command"])
    assert patrol["entrypoint"] == ["veil"]
    assert arguments.handler == "patrol"
    assert arguments.replicas_of == [f"http://veil:{PORT}"]
    assert "registry:/registry" in patrol["volumes"]
    fit = compose["services"]["fit"]
    assert fit["entrypoint"] == ["veil"]
    example = re.search(r"run --rm fit (fit .*?--alias live)", (DEPLOY / "compose.yaml").read_text(), re.DOTALL)
    assert example is not None
    assert parses_as_veil(["veil", *shlex.split(example.group(1).replace("\\\n#", ""))]) == "fit"


def test_secrets_mounted_as_files_are_read(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # What compose relies on: Docker mounts the secret as /run/secrets/veil_admin_token.
    (tmp_path / "veil_admin_token").write_text("from-a-file")
    monkeypatch.setenv("VEIL_SECRETS_DIR", str(tmp_path))
    monkeypatch.delenv("VEIL_ADMIN_TOKEN", raising=False)
    settings = load_settings()
    assert settings.admin_token is not None
    assert settings.admin_token.get_secret_value() == "from-a-file"
