"""docker-compose.yml and the Dockerfile, checked without Docker: services, images, volumes,
and that every command is a `closure` subcommand with options the CLI has."""

from __future__ import annotations

from pathlib import Path

import click
import pytest
import typer.main
import yaml

from closure.cli import app

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def compose() -> dict:
    return yaml.safe_load((ROOT / "docker-compose.yml").read_text())


@pytest.fixture(scope="module")
def cli() -> click.Group:
    return typer.main.get_command(app)


def options_of(command: click.Command) -> set[str]:
    return {opt for p in command.params for opt in (*p.opts, *p.secondary_opts)}


def test_services_and_images(compose):
    services = compose["services"]
    assert set(services) == {"redis", "postgres", "api", "worker"}
    assert services["redis"]["image"].startswith("redis:")
    assert services["postgres"]["image"].startswith("postgres:")
    for name in ("api", "worker"):
        assert services[name]["build"] == "." and services[name]["image"] == "closure:latest"
    # workers scale with --scale worker=N: no fixed container name, no host port
    assert "container_name" not in services["worker"] and "ports" not in services["worker"]


def test_redis_persists_to_a_volume(compose):
    redis = compose["services"]["redis"]
    cmd = redis["command"]
    assert cmd[0] == "redis-server" and cmd[cmd.index("--appendonly") + 1] == "yes"
    assert any(v.split(":")[1] == "/data" and v.split(":")[0] in compose["volumes"]
               for v in redis["volumes"])
    assert any(v.endswith(":/var/lib/postgresql/data") for v in
               compose["services"]["postgres"]["volumes"])


def test_api_and_worker_share_the_data_and_store_volumes(compose):
    mounts = {}
    for name in ("api", "worker"):
        mounts[name] = {v.split(":")[1]: v.split(":")[0] for v in
                        compose["services"][name]["volumes"]}
    assert mounts["api"]["/data"] == mounts["worker"]["/data"] == "data"
    assert mounts["api"]["/store"] == mounts["worker"]["/store"] == "store"
    assert {"data", "store"} <= set(compose["volumes"])
    # input files are never written: read-only for the processes that read them
    assert all(v.endswith(":ro") for n in ("api", "worker")
               for v in compose["services"][n]["volumes"] if ":/data" in v)


@pytest.mark.parametrize("service,subcommand", [("api", "api"), ("worker", "worker")])
def test_commands_exist_in_the_cli(compose, cli, service, subcommand):
    cmd = compose["services"][service]["command"]
    assert cmd[0] == subcommand and subcommand in cli.commands
    known = options_of(cli.commands[subcommand])
    given = [a for a in cmd[1:] if a.startswith("--")]
    assert given and set(given) <= known, set(given) - known
    args = dict(zip(cmd[1::2], cmd[2::2], strict=False))
    assert args["--redis"] == "redis://redis:6379/0"
    assert args["--db"].startswith("postgresql+psycopg://")
    assert args["--store"] == "/store"


def test_api_listens_publicly_only_with_a_token(compose):
    api = compose["services"]["api"]
    cmd = api["command"]
    assert cmd[cmd.index("--host") + 1] == "0.0.0.0"
    assert api["environment"]["CLOSURE_TOKEN"].startswith("${CLOSURE_TOKEN:?")


def test_environment_names_are_the_ones_the_service_reads(compose):
    import api.deps

    doc = api.deps.__doc__
    for name in ("api", "worker"):
        for var in compose["services"][name]["environment"]:
            assert var in doc, var


def test_dockerfile_installs_the_package_and_runs_closure():
    text = (ROOT / "Dockerfile").read_text()
    assert text.startswith("#") and "FROM python:3.11" in text
    for line in ("COPY closure ./closure", "COPY api ./api", "COPY worker ./worker",
                 "RUN pip install ."):
        assert line in text
    assert 'ENTRYPOINT ["closure"]' in text and "USER closure" in text
