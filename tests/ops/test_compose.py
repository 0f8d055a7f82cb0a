"""docker-compose.yml and .env.example kept honest without a container engine.

The engine cannot run here, so the file is checked against the code: every service command parses
with the real ``halfwatch`` argument parser, every ``HALFWATCH_`` variable is a field of the Settings
class (which ignores unknown variables silently, so a typo would otherwise go unnoticed), the Python
health checks compile and import modules that exist, and no secret is written into the file.
Compose file structure (services, healthcheck, depends_on conditions, ``${VAR:?message}``
interpolation) follows the Compose Specification (compose-spec, from memory).
"""

from __future__ import annotations

import ast
import importlib.util
import re
from pathlib import Path

import pytest
import yaml  # PyYAML is in the test extras

ROOT = Path(__file__).resolve().parents[2]
LONG_RUNNING = ("api", "worker-1", "worker-2", "mail-sink", "db")
VAR = re.compile(r"\$\{([A-Z0-9_]+)(?::?[-?][^}]*)?\}")


@pytest.fixture(scope="module")
def compose() -> dict:
    return yaml.safe_load((ROOT / "docker-compose.yml").read_text())


@pytest.fixture(scope="module")
def env_example() -> dict[str, str]:
    out = {}
    for line in (ROOT / ".env.example").read_text().splitlines():
        if line.strip() and not line.lstrip().startswith("#"):
            key, _, value = line.partition("=")
            out[key.strip()] = value.strip()
    return out


def _settings_fields() -> set[str]:
    from server.settings import Settings

    return {f"HALFWATCH_{name.upper()}" for name in Settings.model_fields}


def test_every_halfwatch_command_parses_with_the_real_cli(compose):
    from server.cli import build_parser

    parser = build_parser()
    seen = []
    for name, svc in compose["services"].items():
        cmd = svc.get("command")
        if not cmd or cmd[0] != "halfwatch":
            continue
        args = parser.parse_args(cmd[1:])  # SystemExit (a failure) for an unknown command or option
        assert callable(args.func), name
        seen.append(cmd[1])
    assert sorted(set(seen)) == ["db", "mail-sink", "serve", "worker"]


def test_services_the_issue_asks_for(compose):
    services = compose["services"]
    workers = [n for n, s in services.items() if s.get("command") == ["halfwatch", "worker"]]
    assert len(workers) == 2
    assert services["db"]["image"].startswith("postgres:")
    assert services["migrate"]["command"] == ["halfwatch", "db", "upgrade"]
    for name in ("api", *workers):
        assert services[name]["depends_on"]["migrate"]["condition"] == "service_completed_successfully"
    assert services["migrate"]["depends_on"]["db"]["condition"] == "service_healthy"
    # the database lives in a named volume
    volume = services["db"]["volumes"][0].split(":")[0]
    assert volume in compose["volumes"]
    for name in LONG_RUNNING:
        assert services[name]["healthcheck"]["test"], name


def test_python_health_checks_compile_and_import_real_modules(compose):
    checked = 0
    for name, svc in compose["services"].items():
        test = (svc.get("healthcheck") or {}).get("test") or []
        if test[:3] != ["CMD", "python", "-c"]:
            continue
        tree = ast.parse(test[3])
        for node in ast.walk(tree):
            if isinstance(node, ast.ImportFrom):
                assert importlib.util.find_spec(node.module) is not None, (name, node.module)
                module = importlib.import_module(node.module)
                for alias in node.names:
                    assert hasattr(module, alias.name), (name, node.module, alias.name)
            elif isinstance(node, ast.Import):
                for alias in node.names:
                    assert importlib.util.find_spec(alias.name) is not None, (name, alias.name)
        checked += 1
    assert checked >= 3


def test_every_halfwatch_variable_is_a_setting(compose, env_example):
    fields = _settings_fields()
    text = (ROOT / "docker-compose.yml").read_text()
    used = set(re.findall(r"\bHALFWATCH_[A-Z0-9_]+", text))
    used |= {k for k in env_example if k.startswith("HALFWATCH_")}
    assert used, "the compose file sets no HALFWATCH_ variable"
    unknown = sorted(used - fields)
    assert not unknown, f"not fields of server.settings.Settings: {unknown}"


def test_no_secret_in_the_compose_file_and_env_example_has_placeholders(compose, env_example):
    env = compose["x-halfwatch-env"]
    assert ":?" in env["HALFWATCH_SECRET_KEY"]  # refused to start without a value from .env
    assert ":?" in compose["services"]["db"]["environment"]["POSTGRES_PASSWORD"]
    for key in ("POSTGRES_PASSWORD", "HALFWATCH_SECRET_KEY"):
        assert env_example[key].startswith("CHANGE"), key
    # every ${VAR} the compose file reads is explained in .env.example
    read = set(VAR.findall((ROOT / "docker-compose.yml").read_text())) - {"POSTGRES_USER", "POSTGRES_DB"}
    assert read <= set(env_example), sorted(read - set(env_example))
    assert ".env" in (ROOT / ".gitignore").read_text().split()


def test_dockerfile_runs_the_cli_and_ships_the_dashboard():
    text = (ROOT / "Dockerfile").read_text()
    assert "COPY web web" in text and "pip install" in text
    cmd = re.search(r'^CMD (\[.*\])$', text, re.M)
    from server.cli import build_parser

    args = ast.literal_eval(cmd.group(1))
    assert args[0] == "halfwatch"
    build_parser().parse_args(args[1:])
