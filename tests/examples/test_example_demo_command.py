from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path


def test_demo_runs_end_to_end_with_a_small_budget(tmp_path: Path) -> None:
    # The full demo is measured by hand (see the README); here a 34-run budget: the initial
    # design, one refit and a few proposed runs, through the real worker protocol.
    report = tmp_path / "demo.html"
    env = {k: v for k, v in os.environ.items() if not k.startswith("HONING_")}
    result = subprocess.run(
        [
            sys.executable,
            "-m",
            "honing.client.cli",
            "demo",
            "--max-runs",
            "34",
            "--report",
            str(report),
        ],
        capture_output=True,
        text=True,
        env=env,
        cwd=tmp_path,
        timeout=600,
    )
    assert result.returncode in (0, 3), result.stderr
    out = result.stdout
    header = next(line for line in out.splitlines() if line.startswith("parameter"))
    assert header.split()[-1] == "true"
    for name in ("velocity", "dispersivity", "retardation", "decay"):
        assert any(line.startswith(name) for line in out.splitlines()), name
    assert f"report: {report}" in out
    assert "<html" in report.read_text().lower()
    assert "independent measurements" in out
    # A spent budget is explained, with the way to go on that suits a temporary store.
    spent = result.returncode == 3
    assert ("warning: run budget spent before convergence" in out) is spent
    assert ("rerun with a larger --max-runs" in out) is spent
    assert "runs 34 done, 0 failed" in result.stderr
    assert "Traceback" not in result.stderr
