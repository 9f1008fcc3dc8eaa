"""Reading archives of runs for import: JSON and CSV follow the same rules."""

from __future__ import annotations

import json
from pathlib import Path

from honing.client.files import read_runs

SPEC = {
    "spec": {
        "parameters": [{"name": "a"}],
        "observations": [{"name": "y", "values": [0.0]}],
    }
}


def test_json_runs_keep_parameters_and_outputs_of_finished_runs_only(tmp_path: Path) -> None:
    runs = [
        {"parameters": {"a": 1.0}, "outputs": {"y": [2.0]}},  # written by hand: no state
        {"run_id": "r2", "state": "done", "parameters": {"a": 2.0}, "outputs": {"y": [3.0]},
         "trust": 0.9, "worker": "w"},  # written by 'honing runs': extra fields dropped
        {"state": None, "parameters": {"a": 3.0}, "outputs": {"y": [4.0]}},
        {"state": "failed", "parameters": {"a": 4.0}, "outputs": None, "error": "boom"},
        {"state": "leased", "parameters": {"a": 5.0}, "outputs": None},
        {"parameters": {"a": 6.0}, "outputs": None},  # no outputs: skipped, as a blank CSV row
    ]  # fmt: skip
    path = tmp_path / "runs.json"
    path.write_text(json.dumps({"runs": runs}))
    archive = read_runs(path, SPEC)
    assert archive.runs == [
        {"parameters": {"a": a}, "outputs": {"y": [a + 1.0]}} for a in (1.0, 2.0, 3.0)
    ]
    assert archive.skipped == 3  # counted, so the command line can say so


def test_csv_rows_follow_the_same_rules(tmp_path: Path) -> None:
    path = tmp_path / "runs.csv"
    path.write_text("state,a,y[0]\n,1.0,2.0\ndone,2.0,3.0\nfailed,4.0,\nleased,5.0,\n")
    archive = read_runs(path, SPEC)
    assert archive.runs == [
        {"parameters": {"a": a}, "outputs": {"y": [a + 1.0]}} for a in (1.0, 2.0)
    ]
    assert archive.skipped == 2
