"""The container files, checked without Docker: structure, settings, and every honing command.

Docker cannot run in the test environment, so these tests parse ``docker/Dockerfile`` and
``docker/compose.yaml`` and run each ``honing ...`` command they contain with ``--help`` (and
the health check against a stand-in server), so a renamed command or option fails here
rather than in a deployment.
"""

from __future__ import annotations

import json
import shlex
import shutil
import subprocess
import sys
import threading
from collections.abc import Iterator
from http.server import BaseHTTPRequestHandler, HTTPServer
from pathlib import Path
from typing import Any, ClassVar

import pytest
import yaml

DOCKER = Path(__file__).resolve().parents[2] / "docker"
STORE = "redis://redis:6379/0"


def _instructions() -> list[tuple[str, str]]:
    """``(INSTRUCTION, arguments)`` of the Dockerfile, continuation lines joined."""
    text = (DOCKER / "Dockerfile").read_text()
    lines = [line for line in text.splitlines() if not line.lstrip().startswith("#")]
    joined = "\n".join(lines).replace("\\\n", " ")
    out = []
    for line in joined.splitlines():
        if line.strip():
            keyword, _, rest = line.strip().partition(" ")
            out.append((keyword.upper(), " ".join(rest.split())))
    return out


def _exec_form(arguments: str) -> list[str]:
    value = json.loads(arguments)
    assert isinstance(value, list) and all(isinstance(v, str) for v in value), arguments
    return value


def _compose() -> dict[str, Any]:
    return yaml.safe_load((DOCKER / "compose.yaml").read_text())


def _argv(command: Any) -> list[str]:
    return shlex.split(command) if isinstance(command, str) else [str(c) for c in command]


def _honing_commands() -> list[tuple[str, list[str]]]:
    """Every ``honing ...`` command line in the two files, with where it comes from."""
    found = []
    for keyword, arguments in _instructions():
        if keyword == "CMD":
            found.append(("Dockerfile CMD", _exec_form(arguments)))
        elif keyword == "HEALTHCHECK":
            found.append(("Dockerfile HEALTHCHECK", _exec_form(arguments.split(" CMD ", 1)[1])))
    for name, service in _compose()["services"].items():
        if "command" in service:
            found.append((f"compose {name}", _argv(service["command"])))
        test = service.get("healthcheck", {}).get("test")
        if test:
            found.append((f"compose {name} healthcheck", _argv(test)[1:]))
    return [(where, argv) for where, argv in found if argv and argv[0] == "honing"]


def _honing() -> str:
    beside = Path(sys.executable).with_name("honing")
    if beside.exists():
        return str(beside)
    found = shutil.which("honing")
    assert found, "the honing command is not installed (pip install -e '.[server,test]')"
    return found


def test_dockerfile_base_user_install_health_and_command() -> None:
    instructions = _instructions()
    keywords = [k for k, _ in instructions]
    assert instructions[0] == ("FROM", "python:3.11-slim")
    users = [a for k, a in instructions if k == "USER"]
    assert users and users[-1] not in {"root", "0"}, users
    assert keywords.index("USER") < keywords.index("CMD")
    assert any(k == "RUN" and 'pip install ".[server]"' in a for k, a in instructions)
    assert keywords.count("HEALTHCHECK") == 1
    cmd = [_exec_form(a) for k, a in instructions if k == "CMD"]
    assert cmd == [["honing", "serve", "--host", "0.0.0.0", "--port", "8750", "--store", STORE]]


def test_compose_runs_durable_redis_two_api_replicas_and_one_refitter() -> None:
    services = _compose()["services"]
    redis = _argv(services["redis"]["command"])
    assert redis[0] == "redis-server"
    flags = dict(zip(redis[1::2], redis[2::2], strict=True))
    assert flags["--appendonly"] == "yes"
    assert flags["--appendfsync"] in {"always", "everysec"}
    assert flags["--maxmemory-policy"] == "noeviction"
    assert any(v.endswith(":/data") for v in services["redis"]["volumes"])

    api, refitter = services["api"], services["refitter"]
    assert api["deploy"]["replicas"] == 2
    assert refitter.get("deploy", {}).get("replicas", 1) == 1
    assert _argv(api["command"])[:2] == ["honing", "serve"]
    assert _argv(refitter["command"]) == ["honing", "refitter", "--store", STORE]
    assert refitter["healthcheck"] == {"disable": True}, "the refitter serves no /healthz"
    for service in (api, refitter):
        assert service["build"] == {"context": "..", "dockerfile": "docker/Dockerfile"}
        assert service["depends_on"]["redis"]["condition"] == "service_healthy"
    api_argv = _argv(api["command"])
    assert api_argv[api_argv.index("--store") + 1] == STORE
    secret = api_argv[api_argv.index("--admin-key-file") + 1]
    assert secret == f"/run/secrets/{api['secrets'][0]}"


@pytest.mark.parametrize(
    ("where", "argv"), _honing_commands(), ids=[where for where, _ in _honing_commands()]
)
def test_every_honing_command_exists(where: str, argv: list[str]) -> None:
    result = subprocess.run(
        [_honing(), argv[1], "--help"], capture_output=True, text=True, timeout=60, check=False
    )
    assert result.returncode == 0, f"{where}: honing {argv[1]} --help: {result.stderr}"
    for option in (a for a in argv[2:] if a.startswith("--")):
        assert option in result.stdout, f"{where}: honing {argv[1]} has no option {option}"


def test_the_files_hold_the_expected_honing_commands() -> None:
    # Guards the parametrised test above against silently finding nothing.
    where = sorted(w for w, _ in _honing_commands())
    assert where == [
        "Dockerfile CMD",
        "Dockerfile HEALTHCHECK",
        "compose api",
        "compose refitter",
    ]


class _Health(BaseHTTPRequestHandler):
    """Answers every GET with ``status`` and records the paths asked for."""

    status: ClassVar[int] = 200
    paths: ClassVar[list[str]] = []

    def do_GET(self) -> None:
        type(self).paths.append(self.path)
        body = json.dumps({"status": "ok", "store": "redis"}).encode()
        self.send_response(self.status)
        self.send_header("Content-Type", "application/json")
        self.send_header("Content-Length", str(len(body)))
        self.end_headers()
        self.wfile.write(body)

    def log_message(self, format: str, *args: Any) -> None:
        pass


@pytest.fixture
def health_server() -> Iterator[tuple[HTTPServer, type[_Health]]]:
    handler = type("Handler", (_Health,), {"paths": []})
    server = HTTPServer(("127.0.0.1", 0), handler)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield server, handler
    finally:
        server.shutdown()
        server.server_close()
        thread.join()


@pytest.mark.parametrize("status", [200, 503])
def test_health_check_asks_healthz_and_fails_on_503(
    health_server: tuple[HTTPServer, type[_Health]], status: int
) -> None:
    server, handler = health_server
    handler.status = status
    (argv,) = [argv for where, argv in _honing_commands() if where == "Dockerfile HEALTHCHECK"]
    url = argv[argv.index("--url") + 1]
    assert url == "http://127.0.0.1:8750", "the check must ask the server in its own container"
    argv[argv.index("--url") + 1] = f"http://127.0.0.1:{server.server_port}"
    result = subprocess.run(
        [_honing(), *argv[1:]], capture_output=True, text=True, timeout=60, check=False
    )
    # The client may retry a 503; every attempt must ask /healthz.
    assert handler.paths and set(handler.paths) == {"/healthz"}, handler.paths
    assert (result.returncode == 0) == (status == 200), result
