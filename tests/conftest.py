"""Fixtures shared by every test folder: a private redis-server and a temporary SQLite URL."""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest

REDIS_BINARIES = ("/usr/bin/redis-server", "/usr/local/bin/redis-server")


def free_port() -> int:
    """A TCP port on loopback that nothing listens on right now."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _redis_binary() -> str | None:
    found = shutil.which("redis-server")
    if found:
        return found
    return next((b for b in REDIS_BINARIES if os.access(b, os.X_OK)), None)


@dataclass
class RedisServer:
    """A redis-server process this test session started, on its own port and folder."""

    binary: str
    folder: Path
    port: int
    appendonly: bool
    process: subprocess.Popen[bytes] | None = None

    @property
    def url(self) -> str:
        return f"redis://127.0.0.1:{self.port}/0"

    def start(self) -> None:
        """Start (or restart, keeping its data folder and port) and wait until it answers."""
        args = [
            self.binary,
            "--port", str(self.port),
            "--bind", "127.0.0.1",
            "--dir", str(self.folder),
            "--save", "",
            "--appendonly", "yes" if self.appendonly else "no",
            "--appendfsync", "always",
            "--maxmemory-policy", "noeviction",
            "--daemonize", "no",
        ]  # fmt: skip
        self.process = subprocess.Popen(
            args, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, cwd=self.folder
        )
        deadline = time.monotonic() + 20
        while time.monotonic() < deadline:
            if self.process.poll() is not None:
                raise RuntimeError(f"redis-server exited with {self.process.returncode}")
            try:
                with socket.create_connection(("127.0.0.1", self.port), timeout=0.2) as s:
                    s.sendall(b"PING\r\n")
                    if s.recv(64).startswith(b"+PONG"):
                        return
            except OSError:
                pass
            time.sleep(0.05)
        raise RuntimeError("redis-server did not answer within 20 s")

    def stop(self, kill: bool = False) -> None:
        """Stop the server (SIGKILL when ``kill``)."""
        if self.process is None:
            return
        if kill:
            self.process.kill()
        else:
            self.process.terminate()
        self.process.wait(timeout=20)
        self.process = None


def _start_private_redis(folder: Path, appendonly: bool) -> RedisServer:
    binary = _redis_binary()
    if binary is None:
        if os.environ.get("CI") == "true":
            pytest.fail("redis-server is not installed; CI needs it (apt-get install redis-server)")
        pytest.fail(
            "redis-server is not installed: install it (apt-get install redis-server) "
            "or set REDIS_URL to a server whose database may be flushed"
        )
    server = RedisServer(binary, folder, free_port(), appendonly)
    server.start()
    return server


@pytest.fixture(scope="session")
def redis_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[RedisServer | None]:
    """The session's private redis-server (None when REDIS_URL points elsewhere, outside CI)."""
    if os.environ.get("REDIS_URL") and os.environ.get("CI") != "true" and not _redis_binary():
        yield None
        return
    server = _start_private_redis(tmp_path_factory.mktemp("redis"), appendonly=False)
    yield server
    server.stop()


@pytest.fixture
def redis_url(redis_server: RedisServer | None) -> str:
    """URL of a flushed Redis database for this test."""
    import redis

    url = redis_server.url if redis_server is not None else os.environ["REDIS_URL"]
    client = redis.Redis.from_url(url)
    client.flushdb()
    client.close()
    return url


@pytest.fixture
def redis_factory(tmp_path: Path) -> Iterator[Callable[..., RedisServer]]:
    """Start extra private redis-servers (for example with AOF on), stopped after the test."""
    started: list[RedisServer] = []

    def start(appendonly: bool = True) -> RedisServer:
        folder = tmp_path / f"redis-{len(started)}"
        folder.mkdir()
        server = _start_private_redis(folder, appendonly)
        started.append(server)
        return server

    yield start
    for server in started:
        server.stop()


@pytest.fixture
def sqlite_url(tmp_path: Path) -> str:
    """URL of a fresh SQLite file in the test's folder."""
    return f"sqlite:///{tmp_path / 'honing.db'}"


@pytest.fixture
def unused_port() -> Callable[[], int]:
    """Pick a free loopback TCP port (call once per server)."""
    return free_port
