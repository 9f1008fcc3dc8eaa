"""Plain-text tables for the terminal: posterior summaries, run counts and diagnostics."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

__all__ = [
    "CAUTION",
    "diagnostics_line",
    "format_number",
    "format_table",
    "posterior_table",
    "warning_lines",
]

#: One line shown under every posterior a person reads.
CAUTION = (
    "Calibrated values are estimates conditional on the model and the data; check them against "
    "independent measurements before use, and follow local codes and licensed practice."
)


def format_number(value: Any, digits: int = 4) -> str:
    """A number with ``digits`` significant digits; ``-`` for missing values."""
    if value is None or isinstance(value, bool):
        return "-"
    if isinstance(value, int):
        return str(value)
    if not isinstance(value, float):
        return str(value)
    if not math.isfinite(value):
        return str(value)
    if value == 0.0:
        return "0"
    magnitude = abs(value)
    if 1e-3 <= magnitude < 10**digits:
        return f"{value:.{digits}g}"
    return f"{value:.{digits - 1}e}"


def format_table(headers: Sequence[str], rows: Sequence[Sequence[Any]]) -> str:
    """Columns padded to their widest cell; numbers right-aligned, text left-aligned."""
    cells = [[format_number(v) for v in row] for row in rows]
    numeric = [
        all(isinstance(row[i], int | float) or row[i] is None for row in rows) and bool(rows)
        for i in range(len(headers))
    ]
    widths = [max([len(h)] + [len(r[i]) for r in cells]) for i, h in enumerate(headers)]

    def line(values: Sequence[str]) -> str:
        parts = [
            v.rjust(w) if num else v.ljust(w)
            for v, w, num in zip(values, widths, numeric, strict=True)
        ]
        return "  ".join(parts).rstrip()

    rule = "  ".join("-" * w for w in widths)
    return "\n".join([line(list(headers)), rule, *(line(r) for r in cells)])


def posterior_table(
    summary: Mapping[str, Any],
    units: Mapping[str, str | None] | None = None,
    truth: Mapping[str, float] | None = None,
) -> str:
    """The posterior summary of every parameter as a table (``truth`` adds a column)."""
    headers = ["parameter", "unit", "mean", "sd", "median", "2.5%", "97.5%", "MAP", "prior sd"]
    if truth is not None:
        headers.append("true")
    rows = []
    for name, stats in (summary.get("parameters") or {}).items():
        ci = stats.get("ci95") or [None, None]
        row = [
            name,
            (units or {}).get(name) or "",
            stats.get("mean"),
            stats.get("sd"),
            stats.get("median"),
            ci[0],
            ci[1],
            stats.get("map"),
            stats.get("prior_sd"),
        ]
        if truth is not None:
            row.append(truth.get(name))
        rows.append(row)
    return format_table(headers, rows)


def warning_lines(summary: Mapping[str, Any]) -> list[str]:
    """The engine's warnings on a posterior, one ``warning: ...`` line each."""
    diagnostics = summary.get("diagnostics") or {}
    return [f"warning: {w}" for w in diagnostics.get("warnings") or []]


def diagnostics_line(summary: Mapping[str, Any]) -> str:
    """Round, runs, validation error, posterior change and status on one line."""
    diagnostics = summary.get("diagnostics") or {}
    return (
        f"round {format_number(summary.get('round'))}"
        f" | runs completed {format_number(summary.get('runs_completed'))}"
        f"{_fitted_on(summary)}"
        f" | validation error {format_number(diagnostics.get('validation_error'), 3)}"
        f" | posterior change {format_number(diagnostics.get('posterior_change'), 3)}"
        f" | surrogate terms {format_number(diagnostics.get('surrogate_terms'))}"
        f" | status {summary.get('status') or '-'}"
    )


def _fitted_on(summary: Mapping[str, Any]) -> str:
    """ " (posterior from N)" when the posterior was fitted on fewer runs than have completed."""
    fitted, completed = summary.get("runs_fitted"), summary.get("runs_completed")
    if isinstance(fitted, int) and isinstance(completed, int) and fitted != completed:
        return f" (posterior from {format_number(fitted)})"
    return ""
