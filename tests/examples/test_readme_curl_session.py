"""The README's curl session, run as written against a live server."""

from __future__ import annotations

import json
import re
import subprocess
from pathlib import Path

README = Path(__file__).resolve().parents[2] / "README.md"


def _session() -> str:
    text = README.read_text()
    start = text.index("## Talking to honing from any language")
    (block,) = re.findall(r"```sh\n(.*?)```", text[start:], flags=re.S)[:1]
    return block


def _documents(text: str) -> list[object]:
    """The JSON documents printed one after another (curl adds no newline after a body)."""
    decoder, out, at = json.JSONDecoder(), [], 0
    while at < len(text):
        if text[at].isspace():
            at += 1
            continue
        document, at = decoder.raw_decode(text, at)
        out.append(document)
    return out


def test_the_curl_session_runs_as_written(live_server: str, tmp_path: Path) -> None:
    script = _session().replace("URL=http://127.0.0.1:8750", f"URL={live_server}", 1)
    assert f"URL={live_server}" in script  # the address is the one line a reader changes
    (tmp_path / "examples").symlink_to(README.parent / "examples")
    result = subprocess.run(
        ["bash", "-e", "-o", "pipefail", "-c", script],
        cwd=tmp_path,
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert result.returncode == 0, result.stderr + result.stdout
    lease, report, posterior = _documents(result.stdout)
    assert lease["runs"][0]["run_id"] == "r1"
    assert report == {"run_id": "r1", "state": "failed", "trust": None}
    assert posterior["round"] == 0 and posterior["runs_failed"] == 1
    assert (tmp_path / "report.html").read_text().startswith("<!DOCTYPE html>")
