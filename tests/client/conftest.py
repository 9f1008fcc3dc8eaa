from __future__ import annotations

import json
import os
import subprocess
import sys
import threading
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

import pytest

# A safety net against a hung subprocess, not a timing assertion.
SUBPROCESS_LIMIT = 180


@dataclass
class Canned:
    """A fake honing server: answers from ``routes`` and records every request."""

    url: str = ""
    routes: dict[tuple[str, str], Callable[[dict[str, Any]], tuple[int, Any, dict[str, str]]]] = (
        field(default_factory=dict)
    )
    requests: list[tuple[str, str, Any]] = field(default_factory=list)
    lock: threading.Lock = field(default_factory=threading.Lock)

    def on(self, method: str, path: str, answer: Any, status: int = 200, **headers: str) -> None:
        self.routes[(method, path)] = lambda body: (status, answer, headers)

    def on_call(
        self,
        method: str,
        path: str,
        handler: Callable[[dict[str, Any]], tuple[int, Any, dict[str, str]]],
    ) -> None:
        self.routes[(method, path)] = handler

    def bodies(self, method: str, prefix: str) -> list[Any]:
        with self.lock:
            return [b for m, p, b in self.requests if m == method and p.startswith(prefix)]


@pytest.fixture
def fake_server() -> Iterator[Canned]:
    canned = Canned()

    class Handler(BaseHTTPRequestHandler):
        def _answer(self) -> None:
            length = int(self.headers.get("Content-Length") or 0)
            raw = self.rfile.read(length) if length else b""
            body = json.loads(raw) if raw else None
            path = self.path.split("?")[0]
            with canned.lock:
                canned.requests.append((self.command, self.path, body))
            route = canned.routes.get((self.command, path))
            if route is None:
                status, answer, headers = (
                    404,
                    {"type": "about:blank", "title": "Not Found", "status": 404, "detail": path},
                    {},
                )
            else:
                status, answer, headers = route(body)
            data = answer.encode() if isinstance(answer, str) else json.dumps(answer).encode()
            self.send_response(status)
            kind = "application/problem+json" if status >= 400 else "application/json"
            self.send_header("Content-Type", kind)
            self.send_header("Content-Length", str(len(data)))
            for k, v in headers.items():
                self.send_header(k.replace("_", "-"), v)
            self.end_headers()
            self.wfile.write(data)

        do_GET = do_POST = do_PUT = do_PATCH = do_DELETE = _answer

        def log_message(self, format: str, *args: Any) -> None:
            pass

    server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    canned.url = f"http://127.0.0.1:{server.server_address[1]}"
    yield canned
    server.shutdown()
    server.server_close()


@pytest.fixture(scope="session")
def live_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    from honing.api.server import start_background_server

    store = tmp_path_factory.mktemp("client-store") / "client.db"
    url, stop = start_background_server(f"sqlite:///{store}")
    yield url
    stop()


def _cli_env(url: str | None, token: str | None) -> dict[str, str]:
    """This environment without HONING_* settings, then the given URL and token."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("HONING_")}
    if url:
        env["HONING_URL"] = url
    if token:
        env["HONING_TOKEN"] = token
    return env


def _run_cli(
    *args: str, url: str | None = None, token: str | None = None, cwd: Path | None = None
) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "honing.client.cli", *args],
        capture_output=True,
        text=True,
        env=_cli_env(url, token),
        cwd=cwd,
        timeout=SUBPROCESS_LIMIT,
    )


def _start_cli(*args: str, url: str | None = None, token: str | None = None) -> subprocess.Popen:
    """``python -m honing.client.cli ARGS`` in the background, stderr piped (for signals)."""
    return subprocess.Popen(
        [sys.executable, "-m", "honing.client.cli", *args],
        env=_cli_env(url, token),
        stderr=subprocess.PIPE,
        text=True,
    )


def _assert_one_line_error(result: subprocess.CompletedProcess[str], *fragments: str) -> None:
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1, f"expected one error line, got: {result.stderr!r}"
    assert lines[0].startswith("honing: "), lines[0]
    assert "Traceback" not in result.stderr
    for fragment in fragments:
        assert fragment in lines[0], f"{fragment!r} not in {lines[0]!r}"


@pytest.fixture
def cli() -> Callable[..., subprocess.CompletedProcess[str]]:
    """``cli(*args, url=..., token=..., cwd=...)`` runs ``python -m honing.client.cli``."""
    return _run_cli


@pytest.fixture
def cli_process() -> Callable[..., subprocess.Popen]:
    """``cli_process(*args, url=..., token=...)`` starts the command line in the background."""
    return _start_cli


@pytest.fixture
def one_line_error() -> Callable[..., None]:
    """Checks that stderr holds exactly one ``honing: ...`` line with the given fragments."""
    return _assert_one_line_error
