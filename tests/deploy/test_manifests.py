"""deploy/: the manifests parse and point at the service's real routes, ports and paths."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from tests.servers import MOUNT, container_start_command

yaml = pytest.importorskip("yaml", reason="PyYAML is in the dev extra")

DEPLOY = Path(__file__).resolve().parents[2] / "deploy"
PORT = 8080


def documents(name: str) -> list[dict]:
    return [doc for doc in yaml.safe_load_all((DEPLOY / name).read_text()) if doc]


@pytest.fixture(scope="module")
def routes() -> dict[str, set[str]]:
    from stridecast.service import create_app

    # The GET routes the app really serves (FastAPI's route table as published in its schema).
    paths = create_app([]).openapi()["paths"]
    return {path: set(methods) for path, methods in paths.items()}


def test_containerfile_is_multi_stage_non_root_one_worker_with_readiness_check(routes):
    text = (DEPLOY / "Containerfile").read_text()
    assert len(re.findall(r"^FROM ", text, flags=re.M)) == 2
    assert re.search(r"^USER 10001$", text, flags=re.M)
    assert "torch" not in re.findall(r'pip install [^\n]*', text)[0]
    command = container_start_command()
    assert command[:3] == ["stridecast", "serve", MOUNT]
    assert command[command.index("--port") + 1] == str(PORT)
    assert command[command.index("--workers") + 1] == "1"
    (check,) = re.findall(r"http://127\.0\.0\.1:(\d+)(/[a-z/]+)", text)
    assert check == (str(PORT), "/readyz") and "get" in routes["/readyz"]


def test_deployment_probes_ports_mounts_and_resources(routes):
    (deployment,) = documents("kubernetes/deployment.yaml")
    assert deployment["kind"] == "Deployment"
    pod = deployment["spec"]["template"]["spec"]
    assert pod["securityContext"]["runAsNonRoot"] is True
    (container,) = pod["containers"]
    # The image's own start command, not an override.
    assert "command" not in container and "args" not in container
    (port,) = container["ports"]
    assert port["containerPort"] == PORT
    for probe, path in (("readinessProbe", "/readyz"), ("livenessProbe", "/healthz")):
        get = container[probe]["httpGet"]
        assert get["path"] == path and "get" in routes[path] and get["port"] == port["name"]
    assert container["resources"]["requests"]["cpu"] == "1"
    mounts = {mount["mountPath"]: mount for mount in container["volumeMounts"]}
    assert mounts[MOUNT]["readOnly"] is True
    volumes = {volume["name"]: volume for volume in pod["volumes"]}
    assert volumes[mounts[MOUNT]["name"]]["persistentVolumeClaim"]["readOnly"] is True
    assert container["securityContext"]["readOnlyRootFilesystem"] is True


def test_service_and_autoscaler_target_the_deployment():
    (deployment,) = documents("kubernetes/deployment.yaml")
    (service,) = documents("kubernetes/service.yaml")
    (autoscaler,) = documents("kubernetes/hpa.yaml")
    labels = deployment["spec"]["template"]["metadata"]["labels"]
    assert service["spec"]["selector"].items() <= labels.items()
    (container,) = deployment["spec"]["template"]["spec"]["containers"]
    assert service["spec"]["ports"][0]["targetPort"] == container["ports"][0]["name"]
    target = autoscaler["spec"]["scaleTargetRef"]
    assert (target["kind"], target["name"]) == ("Deployment", deployment["metadata"]["name"])
    (metric,) = autoscaler["spec"]["metrics"]
    assert metric["resource"]["name"] == "cpu"


def test_kserve_predictor_uses_the_open_inference_protocol_routes(routes):
    (service,) = documents("kserve/inferenceservice.yaml")
    assert service["apiVersion"] == "serving.kserve.io/v1beta1"
    assert service["kind"] == "InferenceService"
    (container,) = service["spec"]["predictor"]["containers"]
    assert container["ports"][0]["containerPort"] == PORT
    assert "command" not in container and "args" not in container
    for probe in ("readinessProbe", "livenessProbe"):
        get = container[probe]["httpGet"]
        assert "get" in routes[get["path"]] and get["port"] == PORT
    assert "post" in routes["/v2/models/{name}/infer"]
    assert container["securityContext"]["runAsNonRoot"] is True
