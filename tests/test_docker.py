"""docker/: this machine cannot run Docker, so the files are checked against the package instead.

Every ``tikhon`` command and option they run exists in the command line, every ``TIKHON_*`` variable
they set is a setting, every path they copy exists, the catalog URL parses, and the health check's
own code is run against a live server (and against a closed port, where it must fail).
"""

from __future__ import annotations

import json
import re
import shlex
import socket
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
DOCKERFILE = ROOT / "docker" / "Dockerfile"
COMPOSE = ROOT / "docker" / "compose.yaml"


def dockerfile_instructions() -> list[tuple[str, str]]:
    """(INSTRUCTION, arguments) with line continuations joined and comments dropped."""
    text = DOCKERFILE.read_text(encoding="utf-8")
    lines = [line for line in text.splitlines() if not line.lstrip().startswith("#")]
    joined = re.sub(r"\\\n", " ", "\n".join(lines))
    out = []
    for line in joined.splitlines():
        if line.strip():
            word, _, rest = line.strip().partition(" ")
            out.append((word.upper(), " ".join(rest.split())))
    return out


def instr(name: str) -> list[str]:
    return [args for word, args in dockerfile_instructions() if word == name]


def exec_form(args: str) -> list[str]:
    value = json.loads(args)
    assert isinstance(value, list) and all(isinstance(v, str) for v in value), args
    return value


def dockerfile_env() -> dict[str, str]:
    env: dict[str, str] = {}
    for args in instr("ENV"):
        for token in shlex.split(args):
            key, _, value = token.partition("=")
            env[key] = value
    return env


def compose_commands() -> list[list[str]]:
    return [json.loads(m) for m in re.findall(r"^\s*command:\s*(\[.*\])\s*$", COMPOSE.read_text(), re.M)]


def compose_env() -> dict[str, str]:
    """KEY: value pairs of the TIKHON_* variables in the compose file."""
    return dict(re.findall(r"^\s*(TIKHON_[A-Z0-9_]+):\s*\"?([^\"\n]*)\"?\s*$", COMPOSE.read_text(), re.M))


def documented_cli_lines() -> list[list[str]]:
    """The ``tikhon ...`` command lines shown in the files' comments and commands."""
    found = []
    for path in (DOCKERFILE, COMPOSE):
        for m in re.finditer(r"(?<![\w/-])tikhon (?:[a-z-]+)(?: [^`\n)]*)?", path.read_text()):
            found.append(shlex.split(m.group(0)))
    return found


def cli_command(words: list[str]):
    """The click command a ``tikhon ...`` line reaches, and the words after it."""
    import typer

    from service.cli import app

    cmd = typer.main.get_command(app)
    rest = words[1:]
    while rest and hasattr(cmd, "commands") and rest[0] in cmd.commands:
        cmd, rest = cmd.commands[rest[0]], rest[1:]
    return cmd, rest


def test_every_tikhon_command_and_option_exists():
    lines = [c for c in compose_commands() if c and c[0] == "tikhon"] + documented_cli_lines()
    lines.append(exec_form(instr("CMD")[-1]))
    seen = set()
    for words in lines:
        assert words[0] == "tikhon", words
        cmd, rest = cli_command(words)
        assert not hasattr(cmd, "commands"), f"{' '.join(words)}: names no command of the CLI"
        options = {opt for p in cmd.params for opt in getattr(p, "opts", [])}
        for word in rest:
            if word.startswith("--"):
                assert word.split("=")[0] in options, f"{' '.join(words)}: {word} is not an option of {cmd.name}"
        seen.add(cmd.name)
    assert {"serve", "worker", "create"} <= seen  # the API, the worker, the first key


def test_every_variable_is_a_setting():
    from service.settings import Settings

    fields = {f"TIKHON_{name.upper()}" for name in Settings.model_fields}
    # The command line's own variables (server address, API key), declared as typer envvars in service/cli.py.
    fields |= set(re.findall(r'envvar="(TIKHON_[A-Z0-9_]+)"', (ROOT / "service" / "cli.py").read_text()))
    for path in (DOCKERFILE, COMPOSE):
        named = set(re.findall(r"\bTIKHON_[A-Z0-9_]+\b", path.read_text()))
        named.discard("TIKHON_DB_PASSWORD")  # the compose file's own substitution variable, not a setting
        unknown = sorted(named - fields)
        assert not unknown, f"{path.name} names {unknown}, which are not settings (service/settings.py)"
    # The values must parse as the settings they set.
    Settings(**{k.removeprefix("TIKHON_").lower(): v for k, v in dockerfile_env().items() if k.startswith("TIKHON_")})
    values = {k.removeprefix("TIKHON_").lower(): v for k, v in compose_env().items()}
    values["database_url"] = values["database_url"].replace("${TIKHON_DB_PASSWORD:-tikhon}", "tikhon")
    settings = Settings(**values)
    assert settings.embedded_worker is False

    from sqlalchemy.engine import make_url

    url = make_url(settings.catalog_url())
    assert (url.drivername, url.host, url.database) == ("postgresql+psycopg", "db", "tikhon")


def test_dockerfile_shape():
    (base,) = instr("FROM")
    assert re.fullmatch(r"python:3\.(1[1-9])-slim(-\w+)?", base), base
    for args in instr("COPY"):
        *sources, _ = shlex.split(args)
        for src in sources:
            assert (ROOT / src).exists(), f"COPY source {src} does not exist in the repository"
    (user,) = instr("USER")
    assert user not in ("root", "0")
    (run,) = instr("RUN")
    uid = re.search(r"useradd .*--uid (\d+) .*\b" + re.escape(user) + r"\b", run)
    assert uid and int(uid.group(1)) != 0, run  # the user exists in the image and is not root
    env = dockerfile_env()
    (volume,) = instr("VOLUME")
    assert exec_form(volume) == [env["TIKHON_STORE"]]  # the store is the volume
    assert instr("EXPOSE") == [env["TIKHON_PORT"]]
    (health,) = instr("HEALTHCHECK")
    assert "/healthz" in health and "CMD [" in health
    # The package builds from exactly what the image copies (pyproject's package discovery finds service).
    pyproject = (ROOT / "pyproject.toml").read_text()
    assert 'tikhon = "service.cli:main"' in pyproject


def test_compose_services():
    text = COMPOSE.read_text()
    services = re.findall(r"^  ([a-z][a-z0-9_-]*):\s*$", text.split("\nservices:\n", 1)[1].split("\nvolumes:\n", 1)[0], re.M)
    assert services == ["db", "api", "worker"]
    assert compose_commands() == [["tikhon", "serve", "--no-worker", "--workers", "auto"], ["tikhon", "worker"]]
    assert re.search(r"^\s*image: postgres:\d+", text, re.M)
    store = dockerfile_env()["TIKHON_STORE"]
    assert text.count(f"store:{store}") == 2  # api and worker share the store volume
    assert "dockerfile: docker/Dockerfile" in text and (ROOT / "docker" / "Dockerfile").is_file()


def test_the_image_uses_every_core_and_stops_in_time():
    from service.settings import Settings

    env = dockerfile_env()
    image = Settings(**{k.removeprefix("TIKHON_").lower(): v for k, v in env.items() if k.startswith("TIKHON_")})
    assert image.workers == "auto"
    # `docker stop` waits 10 s between SIGTERM and SIGKILL by default (Docker CLI reference, `--time`;
    # from memory): the image's grace period must end before that.
    assert image.shutdown_grace_s < 10
    api = COMPOSE.read_text().split("\n  api:\n", 1)[1].split("\n  worker:\n", 1)[0]
    assert re.search(r"^    init: true$", api, re.M)  # reaps training processes a killed API process left
    grace = float(re.search(r'TIKHON_SHUTDOWN_GRACE_S: "?([\d.]+)"?', api).group(1))
    stop = float(re.search(r"^    stop_grace_period: (\d+)s$", api, re.M).group(1))
    assert grace < stop  # compose waits longer than the server's own grace period


def _healthcheck_code() -> str:
    words = exec_form(instr("HEALTHCHECK")[0].split("CMD ", 1)[1])
    assert words[:2] == ["python", "-c"]
    return words[2]


def test_healthcheck_passes_on_a_live_server_and_fails_on_a_closed_port(live_service, tmp_path):
    code = _healthcheck_code()
    with live_service(tmp_path, worker=False) as (url, _, _):
        port = url.rsplit(":", 1)[1]
        ok = subprocess.run([sys.executable, "-c", code], env={"TIKHON_PORT": port}, capture_output=True, timeout=60)
    assert ok.returncode == 0, ok.stderr
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        closed = str(s.getsockname()[1])
    bad = subprocess.run([sys.executable, "-c", code], env={"TIKHON_PORT": closed}, capture_output=True, timeout=60)
    assert bad.returncode != 0


@pytest.mark.parametrize("module", ["service.cli", "service.api.server", "service.api.supervisor", "service.worker"])
def test_modules_the_image_runs_import(module):
    # `tikhon serve` runs service.api.server, `tikhon worker` service.worker; both through service.cli.
    __import__(module)
