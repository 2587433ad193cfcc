"""The deploy files against the service they deploy: they parse, and their ports, probe paths, environment
names and start command agree with the app's settings, routes and the `equitheta` command.

No container engine runs here, so nothing is built or started; these checks catch the drift between the
files and the code that review alone misses (a renamed variable, a moved probe, a port changed on one side).
"""

from __future__ import annotations

import json
import re
import shlex
from pathlib import Path

import pytest
import yaml

from calibration.cli import build_parser
from service.main import create_app
from service.settings import Settings
from tests.helpers import example_keys

DEPLOY = Path(__file__).parents[1] / "deploy"
ROOT = Path(__file__).parents[1]
SETTING_NAMES = {f"EQUITHETA_{name.upper()}" for name in Settings.model_fields}


@pytest.fixture(scope="module")
def routes(tmp_path_factory: pytest.TempPathFactory) -> set[str]:
    """The probe paths the app answers without a key (any status but 404 and 401/403)."""
    from fastapi.testclient import TestClient

    app = create_app(Settings(store=str(tmp_path_factory.mktemp("store")), log_level="warning"))
    with TestClient(app) as client:
        return {p for p in ("/healthz", "/readyz", "/metrics") if client.get(p).status_code not in (401, 403, 404)}


def dockerfile() -> list[tuple[str, str]]:
    """(instruction, arguments) of the Dockerfile, continuation lines joined, comments dropped."""
    text = re.sub(r"\\\n\s*", " ", (DEPLOY / "Dockerfile").read_text())
    lines = [line.strip() for line in text.splitlines() if line.strip() and not line.strip().startswith("#")]
    return [(line.split(None, 1)[0].upper(), line.split(None, 1)[1]) for line in lines]


def env_pairs(arguments: str) -> dict[str, str]:
    return dict(part.split("=", 1) for part in shlex.split(arguments))


def test_the_image_is_multi_stage_non_root_with_a_health_check(routes: set[str]) -> None:
    instructions = dockerfile()
    stages = [i for i, (op, _) in enumerate(instructions) if op == "FROM"]
    assert len(stages) >= 2  # build stage and runtime stage
    final = instructions[stages[-1] :]
    users = [args for op, args in final if op == "USER"]
    assert users and users[-1] not in ("root", "0")
    env = {k: v for op, args in final if op == "ENV" for k, v in env_pairs(args).items()}
    assert set(env) <= SETTING_NAMES, set(env) - SETTING_NAMES
    # The image's own settings validate, with keys standing in for the mounted key file (it binds 0.0.0.0).
    given = {k.removeprefix("EQUITHETA_").lower(): v for k, v in env.items()}
    settings = Settings(store="bundles", api_keys=example_keys(), **given)
    exposed = [int(args) for op, args in final if op == "EXPOSE"]
    assert exposed == [settings.port]
    check = next(args for op, args in final if op == "HEALTHCHECK")
    url = re.search(r"http://127\.0\.0\.1:(\d+)(/\w+)", check)
    assert url and int(url.group(1)) == settings.port and url.group(2) == "/healthz" and "/healthz" in routes
    command = json.loads(next(args for op, args in final if op == "CMD"))
    assert command == ["equitheta", "serve"]
    assert build_parser().parse_args(command[1:]).command == "serve"
    for op, args in instructions:  # every file the build copies exists
        if op == "COPY" and not args.startswith("--from"):
            for source in args.split()[:-1]:
                assert (ROOT / source).exists(), source


def test_compose_runs_two_replicas_and_redis_with_the_settings_names(routes: set[str]) -> None:
    compose = yaml.safe_load((DEPLOY / "compose.yaml").read_text())
    services = compose["services"]
    assert set(services) == {"redis", "scoring"}
    scoring = services["scoring"]
    assert scoring["deploy"]["replicas"] == 2
    env = {k: str(v) for k, v in scoring["environment"].items()}
    assert set(env) <= SETTING_NAMES
    assert env["EQUITHETA_STORE"].startswith("redis://redis:")  # the Redis service by name
    port = int(env["EQUITHETA_PORT"])
    host, container = scoring["ports"][0].rsplit(":", 1)
    assert int(container) == port and host.startswith("127.0.0.1:")
    first, last = (int(p) for p in host.split(":")[1].split("-"))
    assert last - first + 1 == scoring["deploy"]["replicas"]  # one host port per replica
    mounted = {v.split(":")[1] for v in scoring["volumes"]}
    assert env["EQUITHETA_API_KEYS_FILE"] in mounted
    check = " ".join(scoring["healthcheck"]["test"])
    assert f"127.0.0.1:{port}/healthz" in check and "/healthz" in routes
    assert scoring["depends_on"]["redis"]["condition"] == "service_healthy"


def test_cluster_manifests_agree_with_the_app(routes: set[str]) -> None:
    documents = {d["kind"]: d for d in yaml.safe_load_all((DEPLOY / "k8s" / "scoring.yaml").read_text())}
    assert set(documents) == {"Deployment", "Service", "HorizontalPodAutoscaler"}
    deployment, service, autoscaler = (documents[k] for k in ("Deployment", "Service", "HorizontalPodAutoscaler"))
    pod = deployment["spec"]["template"]
    assert deployment["spec"]["selector"]["matchLabels"].items() <= pod["metadata"]["labels"].items()
    assert service["spec"]["selector"].items() <= pod["metadata"]["labels"].items()
    assert pod["spec"]["securityContext"]["runAsNonRoot"] is True
    (container,) = pod["spec"]["containers"]
    assert container["command"] == ["equitheta", "serve"]
    env = {e["name"]: e for e in container["env"]}
    assert set(env) <= SETTING_NAMES
    assert "secretKeyRef" in env["EQUITHETA_STORE"]["valueFrom"]  # the Redis URL may carry a password
    port = int(env["EQUITHETA_PORT"]["value"])
    assert [p["containerPort"] for p in container["ports"]] == [port]
    assert container["livenessProbe"]["httpGet"] == {"path": "/healthz", "port": port}
    assert container["readinessProbe"]["httpGet"] == {"path": "/readyz", "port": port}
    assert {"/healthz", "/readyz"} <= routes
    assert service["spec"]["ports"][0]["targetPort"] == port
    keys_file = Path(env["EQUITHETA_API_KEYS_FILE"]["value"])
    volumes = {v["name"]: v for v in pod["spec"]["volumes"]}
    mounts = {m["mountPath"]: m["name"] for m in container["volumeMounts"]}
    assert "secret" in volumes[mounts[str(keys_file.parent)]]  # the key file comes from a Secret
    assert "/tmp" in mounts  # writable scratch for the workers' metrics under a read-only root
    target = autoscaler["spec"]["scaleTargetRef"]
    assert (target["kind"], target["name"]) == ("Deployment", deployment["metadata"]["name"])
    assert autoscaler["spec"]["minReplicas"] >= 2
    values = {k: e["value"] for k, e in env.items() if "value" in e and k != "EQUITHETA_API_KEYS_FILE"}
    given = {k.removeprefix("EQUITHETA_").lower(): v for k, v in values.items()}
    Settings(store="redis://redis:6379/0", api_keys=example_keys(), **given)  # keys stand in for the key file
