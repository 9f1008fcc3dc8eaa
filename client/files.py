"""Reading the files a practitioner hands to the command line: specs and archives of runs."""

from __future__ import annotations

import csv
import io
import json
import math
import re
import tomllib
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from honing.client.errors import SettingsError

__all__ = ["load_spec", "read_runs"]

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
    return data


def read_runs(path: str | Path, calibration: Mapping[str, Any]) -> list[dict[str, Any]]:
    """Read runs evaluated elsewhere, as the import endpoint expects them.

    A ``.json`` file holds ``{"runs": [...]}`` or a list of ``{"parameters", "outputs"}``.
    A CSV file has one row per run: a column per parameter (named as in the spec) and a
    column per output value, named ``<observation>[<i>]`` (also accepted: ``<observation>.<i>``,
    ``<observation>_<i>``, ``<observation>:<i>``, 0-based). Other columns are ignored, and
    rows whose ``state`` column says anything but ``done`` are skipped, so a table written by
    ``honing runs -o`` can be imported into another calibration of the same model.
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
        return runs
    return _runs_from_csv(text, calibration, path)


def _runs_from_csv(text: str, calibration: Mapping[str, Any], path: Path) -> list[dict[str, Any]]:
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
    runs = []
    for line, row in enumerate(reader, start=2):
        if row.get("state", "done") not in ("done", ""):
            continue
        if all(not (row.get(c) or "").strip() for c in columns[next(iter(sizes))].values()):
            continue
        try:
            parameters = {n: _number(row[n]) for n in names}
            outputs = {
                obs: [_number(row[columns[obs][i]]) for i in range(size)]
                for obs, size in sizes.items()
            }
        except ValueError as exc:
            raise SettingsError(f"{path}, line {line}: {exc}") from None
        runs.append({"parameters": parameters, "outputs": outputs})
    return runs


def _number(text: str | None) -> float:
    value = float((text or "").strip() or "nan")
    if not math.isfinite(value):
        raise ValueError(f"not a finite number: {text!r}")
    return value


def _reject_constant(name: str) -> float:
    raise ValueError(f"{name} is not allowed")
