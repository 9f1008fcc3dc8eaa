from __future__ import annotations

import shutil
import subprocess
from collections.abc import Iterator
from pathlib import Path

import pytest

EXAMPLES = Path(__file__).resolve().parents[2] / "examples"


@pytest.fixture(scope="session")
def examples() -> Path:
    return EXAMPLES


@pytest.fixture(scope="session")
def live_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    from honing.api.server import start_background_server

    store = tmp_path_factory.mktemp("examples-store") / "examples.db"
    url, stop = start_background_server(f"sqlite:///{store}")
    yield url
    stop()


@pytest.fixture(scope="session")
def column_binary(tmp_path_factory: pytest.TempPathFactory) -> Path:
    compiler = shutil.which("cc")
    assert compiler, "a C compiler (cc) is needed: sudo apt-get install -y gcc"
    binary = tmp_path_factory.mktemp("column") / "column"
    subprocess.run(
        [
            compiler,
            "-O2",
            "-std=c99",
            "-Wall",
            "-Wextra",
            "-Werror",
            "-o",
            str(binary),
            str(EXAMPLES / "column_c" / "column.c"),
            "-lm",
        ],
        check=True,
    )
    return binary
