"""Reading the files a practitioner hands to the command line: specs and archives of runs."""

from __future__ import annotations

import csv
import datetime
import functools
import io
import json
import math
import re
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from honing.client.errors import SettingsError

__all__ = ["RunsFile", "load_spec", "read_runs"]

_INDEXED = re.compile(r"^(?P<name>.+?)(?:\[(?P<a>\d+)\]|[.:_](?P<b>\d+))$")


def load_spec(path: str | Path) -> dict[str, Any]:
    """Read a calibration spec from a ``.toml`` or ``.json`` file."""
    path = Path(path)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise SettingsError(f"cannot read the spec {path}: {exc.strerror or exc}") from None
    try:
        if path.suffix.lower() == ".toml":
            data: Any = tomllib.loads(raw.decode("utf-8"))
        else:
            data = json.loads(raw.decode("utf-8"), parse_constant=_reject_constant)
    except (tomllib.TOMLDecodeError, ValueError) as exc:
        kind = "TOML" if path.suffix.lower() == ".toml" else "JSON"
        raise SettingsError(f"{path} is not valid {kind}: {exc}") from None
    if not isinstance(data, dict):
        raise SettingsError(f"{path} must hold one spec object, got {type(data).__name__}")
    _refuse_dates(data, path, ())
    return data


def _refuse_dates(value: Any, path: Path, where: tuple[str | int, ...]) -> None:
    """TOML's dates and times have no JSON form, and no spec field takes one."""
    if isinstance(value, dict):
        for key, item in value.items():
            _refuse_dates(item, path, (*where, key))
    elif isinstance(value, list):
        for i, item in enumerate(value):
            _refuse_dates(item, path, (*where, i))
    elif isinstance(value, datetime.date | datetime.time):
        field = ".".join(map(str, where))
        raise SettingsError(f"{path}: {field} is a date or time; no spec field takes one")


@dataclass(frozen=True)
class RunsFile:
    """The runs of an archive to import, and how many of its runs were left out (not done,
    or without outputs)."""

    runs: list[dict[str, Any]]
    skipped: int


def read_runs(path: str | Path, calibration: Mapping[str, Any]) -> RunsFile:
    """Read runs evaluated elsewhere, as the import endpoint expects them.

    A ``.json`` file holds ``{"runs": [...]}`` or a list of ``{"parameters", "outputs"}``.
    A CSV file has one row per run: a column per parameter (named as in the spec) and a
    column per output value, named ``<observation>[<i>]`` (also accepted: ``<observation>.<i>``,
    ``<observation>_<i>``, ``<observation>:<i>``, 0-based). Other columns (and other fields
    of a JSON run) are ignored, and runs without outputs or whose ``state`` says anything but
    ``done`` are skipped, so what ``honing runs -o`` writes, as CSV or JSON, can be imported
    into another calibration of the same model.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise SettingsError(f"cannot read {path}: {exc}") from None
    if path.suffix.lower() == ".json":
        try:
            data = json.loads(text, parse_constant=_reject_constant)
        except ValueError as exc:
            raise SettingsError(f"{path} is not valid JSON: {exc}") from None
        runs = data.get("runs") if isinstance(data, dict) else data
        if not isinstance(runs, list):
            raise SettingsError(f"{path} must hold a list of runs or {{'runs': [...]}}")
        for i, run in enumerate(runs):
            if not isinstance(run, dict):
                raise SettingsError(
                    f"{path}: run {i} must be an object {{'parameters', 'outputs'}}, "
                    f"got {type(run).__name__}"
                )
        kept = [
            {"parameters": run.get("parameters"), "outputs": run.get("outputs")}
            for run in runs
            if run.get("state") in (None, "", "done") and run.get("outputs") is not None
        ]
        return RunsFile(kept, len(runs) - len(kept))
    return _runs_from_csv(text, calibration, path)


def _runs_from_csv(text: str, calibration: Mapping[str, Any], path: Path) -> RunsFile:
    spec = calibration.get("spec", calibration)
    names = [p["name"] for p in spec.get("parameters", [])]
    sizes = {o["name"]: len(o["values"]) for o in spec.get("observations", [])}
    reader = csv.DictReader(io.StringIO(text))
    header = reader.fieldnames or []
    missing = [n for n in names if n not in header]
    if missing:
        raise SettingsError(f"{path}: no column for parameter(s) {', '.join(missing)}")
    columns: dict[str, dict[int, str]] = {o: {} for o in sizes}
    for column in header:
        match = _INDEXED.match(column)
        if match and match.group("name") in sizes and column not in names:
            columns[match.group("name")][int(match.group("a") or match.group("b"))] = column
    for obs, size in sizes.items():
        if sorted(columns[obs]) != list(range(size)):
            raise SettingsError(f"{path}: expected columns {obs}[0] to {obs}[{size - 1}]")
    runs, skipped = [], 0
    for line, row in enumerate(reader, start=2):
        if row.get("state", "done") not in ("done", ""):
            skipped += 1
            continue
        if all(not (row.get(c) or "").strip() for c in columns[next(iter(sizes))].values()):
            skipped += 1
            continue
        cell = functools.partial(_cell, row, f"{path}, line {line}")
        parameters = {n: cell(n) for n in names}
        outputs = {obs: [cell(columns[obs][i]) for i in range(size)] for obs, size in sizes.items()}
        runs.append({"parameters": parameters, "outputs": outputs})
    return RunsFile(runs, skipped)


def _cell(row: Mapping[str, str | None], where: str, column: str) -> float:
    """One CSV cell as a finite number; `SettingsError` naming the line and column if not."""
    text = (row.get(column) or "").strip()
    try:
        value = float(text)
    except ValueError:
        value = math.nan
    if not math.isfinite(value):
        shown = repr(text) if len(text) <= 40 else repr(text[:37] + "...")
        raise SettingsError(f"{where}, column {column}: not a finite number: {shown}")
    return value


def _reject_constant(name: str) -> float:
    raise ValueError(f"{name} is not allowed")
