"""deploy/compose.yaml against what the code relies on: the commands parse with the real command
line, every GEOTWEEN_* variable is a setting the service reads and holds a value Settings accepts,
HTTP replicas only queue jobs, workers have unique ids and volumes of their own, and every geotween
service names the same database and object store, which the file itself provides. No Docker engine is
needed: the file is read as YAML (PyYAML, a dependency of dbos) and checked here."""
import os
import re
import tomllib
from pathlib import Path
from urllib.parse import urlparse

import pytest
import yaml

from geotween.service.cli import build_parser
from geotween.service.settings import Settings

ROOT = Path(__file__).resolve().parents[1]
DEPLOY = ROOT / "deploy"
COMPOSE = DEPLOY / "compose.yaml"
PREFIX = "GEOTWEEN_"
# values for the variables the file interpolates (invented for the test)
SECRETS = {"POSTGRES_PASSWORD": "pw-for-the-test", "STORE_ACCESS_KEY": "store-user", "STORE_SECRET_KEY": "store-secret-1",
           "GEOTWEEN_API_KEYS": "deploy-test-key-0123456789"}

# The Compose Specification's interpolation forms: $$ (a literal $), ${VAR}, ${VAR:-default},
# ${VAR-default}, ${VAR:?error}, ${VAR?error} ("Interpolation" section of the specification).
_VAR = re.compile(r"\$\$|\$\{([A-Za-z_][A-Za-z0-9_]*)(?:(:?[-?])([^}]*))?\}")


class Unset(ValueError):
    """A ${VAR:?error} whose variable is not given: compose refuses to start."""


def interpolate(value: str, env: dict[str, str]) -> str:
    def one(m: re.Match) -> str:
        if m.group(0) == "$$":
            return "$"
        name, op, arg = m.groups()
        got = env.get(name)
        empty = got is None or (got == "" and op and op.startswith(":"))
        if op in ("?", ":?") and empty:
            raise Unset(f"{name}: {arg}")
        if op in ("-", ":-") and empty:
            return arg
        return got or ""
    return _VAR.sub(one, value)


def resolved(node, env: dict[str, str]):
    if isinstance(node, str):
        return interpolate(node, env)
    if isinstance(node, list):
        return [resolved(x, env) for x in node]
    if isinstance(node, dict):
        return {k: resolved(v, env) for k, v in node.items()}
    return node


@pytest.fixture
def clean_env(monkeypatch):
    """Settings read GEOTWEEN_* from the environment: the test's own must not leak into the checks."""
    for key in list(os.environ):
        if key.startswith(PREFIX):
            monkeypatch.delenv(key)


@pytest.fixture
def compose():
    return yaml.safe_load(COMPOSE.read_text())


@pytest.fixture
def services(compose):
    return resolved(compose["services"], SECRETS)


def geotween_services(services: dict) -> dict[str, tuple[dict, object]]:
    """name -> (service, its command parsed by the real `geotween` parser)."""
    parser = build_parser()
    return {name: (svc, parser.parse_args(svc["command"][1:])) for name, svc in services.items()
            if svc.get("command") and svc["command"][0] == "geotween"}


def settings_of(svc: dict) -> Settings:
    env = svc.get("environment") or {}
    fields = {k[len(PREFIX):].lower(): v for k, v in env.items() if k.startswith(PREFIX)}
    return Settings.load(**fields)


def mounts(svc: dict) -> dict[str, str]:
    """container path -> source (volume name or host path) of a service's short-syntax volumes."""
    out = {}
    for spec in svc.get("volumes", []):
        source, target = spec.split(":")[:2]
        out[target] = source
    return out


def seconds(duration: str) -> float:
    # Compose durations: a number with a unit (this file uses s and m)
    m = re.fullmatch(r"(\d+(?:\.\d+)?)(s|m)", duration)
    assert m, duration
    return float(m.group(1)) * (60 if m.group(2) == "m" else 1)


def test_the_file_refuses_to_start_without_its_secrets(compose):
    for name in ("POSTGRES_PASSWORD", "STORE_ACCESS_KEY", "STORE_SECRET_KEY"):
        with pytest.raises(Unset, match=name):
            resolved(compose["services"], {k: v for k, v in SECRETS.items() if k != name})
    # the API keys may be left out: then writes are refused (Settings.api_keys empty)
    without_keys = resolved(compose["services"], {k: v for k, v in SECRETS.items() if k != "GEOTWEEN_API_KEYS"})
    assert all(settings_of(svc).api_keys == [] for svc, _ in geotween_services(without_keys).values())


def test_every_geotween_variable_is_a_setting_with_an_accepted_value(services, clean_env):
    found = geotween_services(services)
    assert found
    for name, (svc, _) in found.items():
        for key in svc["environment"]:
            if key.startswith(PREFIX):
                assert key[len(PREFIX):].lower() in Settings.model_fields, (name, key)
        settings_of(svc)  # raises, naming the setting, on a value the service would refuse at start


def test_serve_replicas_only_queue_jobs_and_are_probed_on_readyz(services, clean_env):
    serves = {n: (svc, args) for n, (svc, args) in geotween_services(services).items() if args.command == "serve"}
    assert len(serves) >= 2  # replicas
    published = []
    for name, (svc, args) in serves.items():
        s = settings_of(svc)
        assert s.run_jobs is False, name
        assert args.host == "0.0.0.0", name  # reachable from outside its container
        probe = " ".join(svc["healthcheck"]["test"])
        assert f"127.0.0.1:{args.port}/readyz" in probe, name
        for port in svc["ports"]:
            host_port, container_port = port.rsplit(":", 2)[-2:]
            assert int(container_port) == args.port, name
            published.append(host_port)
        # the orchestrator waits out the drain and the grace before it kills (README, "a clean stop")
        assert seconds(svc["stop_grace_period"]) > s.drain_seconds + s.shutdown_grace, name
    assert len(published) == len(set(published))


def test_workers_have_unique_stable_ids_and_no_http_probe(services, clean_env):
    workers = {n: (svc, args) for n, (svc, args) in geotween_services(services).items() if args.command == "worker"}
    assert len(workers) >= 2
    ids = []
    for name, (svc, args) in workers.items():
        # written in the file (not the default), so a restarted container comes back with the same id
        assert args.id or "GEOTWEEN_WORKER_ID" in svc["environment"], name
        ids.append(args.id or settings_of(svc).worker_id)
        assert "/healthz" in (ROOT / "Dockerfile").read_text()  # the image's own probe asks HTTP ...
        assert svc["healthcheck"] == {"disable": True}, name  # ... which a worker does not serve
    assert len(ids) == len(set(ids)) and "local" not in ids, ids


def test_each_geotween_service_keeps_its_own_registry_folder_and_shares_the_scenes(compose, services, clean_env):
    found = geotween_services(services)
    own, scenes = [], set()
    for name, (svc, _) in found.items():
        s = settings_of(svc)
        at = mounts(svc)
        source = at[str(s.registry_root)]
        assert source in compose["volumes"], name  # a named volume: it outlives the container
        own.append(source)
        scenes.add(at[str(s.scene_root)])
    # staging, downloaded bundles and a worker's checkpoints are local to each container
    assert len(own) == len(set(own)) == len(found)
    assert len(scenes) == 1  # a training's scene path means the same folder to serve and workers


def test_every_geotween_service_names_the_same_database_and_store_which_the_file_provides(services, clean_env):
    found = geotween_services(services)
    settings = {name: settings_of(svc) for name, (svc, _) in found.items()}
    urls = {s.database_url.get_secret_value() for s in settings.values()}
    stores = {(s.store_url, s.store_endpoint) for s in settings.values()}
    assert len(urls) == 1 and len(stores) == 1
    creds = {(svc["environment"]["AWS_ACCESS_KEY_ID"], svc["environment"]["AWS_SECRET_ACCESS_KEY"])
             for svc, _ in found.values()}
    assert len(creds) == 1
    for name, (svc, _) in found.items():
        assert svc["depends_on"]["postgres"]["condition"] == "service_healthy", name
    # the database: the PostgreSQL 15 service, with the user, password and database it creates
    db = urlparse(urls.pop())
    assert db.scheme == "postgresql"
    pg = services[db.hostname]
    assert pg["image"] == "postgres:15"
    assert (db.username, db.password, db.path.lstrip("/")) == (
        pg["environment"]["POSTGRES_USER"], pg["environment"]["POSTGRES_PASSWORD"], pg["environment"]["POSTGRES_DB"])
    # the store: an S3-compatible server of this file, whose one-shot service makes the bucket
    store_url, endpoint = stores.pop()
    bucket = urlparse(store_url).netloc
    server = services[urlparse(endpoint).hostname]
    assert (server["environment"]["MINIO_ROOT_USER"], server["environment"]["MINIO_ROOT_PASSWORD"]) == creds.pop()
    makers = [n for n, svc in services.items() if "mc mb" in " ".join(svc.get("command") or [])]
    assert len(makers) == 1
    script = " ".join(services[makers[0]]["command"])
    alias = re.search(r"mc alias set (\S+) (\S+)", script)
    assert alias and alias.group(2) == endpoint
    assert re.search(rf"mc mb (--\S+ )*{re.escape(alias.group(1))}/{re.escape(bucket)}( |$)", script)
    for name, (svc, _) in found.items():
        assert svc["depends_on"][makers[0]]["condition"] == "service_completed_successfully", name


def test_geotween_services_build_this_repository_and_run_its_command(services):
    scripts = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["scripts"]
    images = set()
    for name, (svc, _) in geotween_services(services).items():
        assert svc["command"][0] in scripts, name
        assert (DEPLOY / svc["build"]["context"]).resolve() == ROOT, name
        assert (ROOT / svc["build"].get("dockerfile", "Dockerfile")).is_file(), name
        images.add(svc["image"])
    assert len(images) == 1  # one image: serve and workers must agree on the jobs' code version
