"""The self-contained HTML report of one calibration.

`render_report` turns a spec, the engine's latest state and the run records into one HTML page:
CSS inline, every plot an inline base64 PNG drawn with matplotlib, no scripts and no external
resources, so the file can be saved, mailed or archived and still opens anywhere.

Plots use `matplotlib.figure.Figure` with the Agg canvas directly (never pyplot), so rendering
holds no global state and is safe in server threads. Every piece of user text (names, units,
warnings, run states) is escaped with `html.escape` in the page, and ``$`` is escaped in plot
labels so matplotlib never reads it as mathematics.

The page works for every stage of a calibration: before the first fit (round 0: prior only,
empty history, no predictive bands) and with partial summaries, where a missing key shows as a
dash or a short note instead of an error.
"""

from __future__ import annotations

import base64
import html
import io
import math
import textwrap
from collections import Counter
from collections.abc import Mapping, Sequence
from datetime import UTC, datetime
from typing import Any

import numpy as np
from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, LogLocator, MaxNLocator, NullFormatter

from honing.engine.spec import NOISE_SCALE_NAME, CalibrationSpec, Observation, Parameter
from honing.engine.state import EngineState

__all__ = ["render_report"]

#: Central prior mass drawn in the marginal plots (from the prior's 0.05 % to 99.95 % points).
PRIOR_MASS = 0.999
#: Posterior draws in the pairwise plot: enough to show shape, few enough for a small PNG.
PAIR_MAX_POINTS = 3000
#: Parameters in the pairwise plot: an 8 by 8 grid still reads at page width.
PAIR_MAX_PARAMETERS = 8
#: Observation channels drawn; the rest are named in a note.
CHANNEL_MAX_PLOTS = 40
#: Data points drawn per channel; longer channels are thinned evenly, and the caption says so.
CHANNEL_MAX_POINTS = 5000
#: Data points drawn with their ± 1 sd bars up to this many per channel; beyond it, the bars
#: cover the bands (1000 points hid both).
ERRORBAR_MAX_POINTS = 150
#: Characters per line of a marginal panel's title and axis label (a 4.4-inch panel, or one
#: of two in 7.4 inches, holds about 40 at the label's size) and of a pair plot's labels.
MARGINAL_LABEL_CHARS = 36
PAIR_LABEL_CHARS = 18
#: Characters per line of a channel plot's axis labels (a 5.6-inch panel).
CHANNEL_LABEL_CHARS = 48
#: A posterior narrower than this share of the plotted prior range gets a close-up panel.
CLOSE_UP_SHARE = 0.2
#: Resolution of every PNG.
DPI = 100

_POSTERIOR = "#1f5f8b"
_PRIOR = "#c0762c"
_DATA = "#202020"
_RUN_STATES = ("leased", "done", "failed", "expired")
_DASH = "–"

_CAUTION = (
    "Calibrated parameters are estimates conditional on the simulator and on the data given to "
    "this calibration. Check them against independent measurements before they drive design or "
    "safety decisions; local codes and licensed engineering practice govern such decisions."
)

_CSS = """
body { font-family: system-ui, sans-serif; margin: 0 auto; max-width: 1180px; padding: 1rem 1.5rem;
       color: #1d1d1d; background: #ffffff; line-height: 1.4; }
h1 { font-size: 1.6rem; margin: 0.2rem 0; }
h2 { font-size: 1.2rem; margin-top: 2rem; border-bottom: 1px solid #d0d0d0;
     padding-bottom: 0.2rem; }
.meta { color: #555555; margin: 0; }
.caution { border-left: 4px solid #c0762c; background: #fbf4ec; padding: 0.6rem 0.9rem;
           margin: 1rem 0; }
.note { color: #555555; font-size: 0.92rem; }
table { border-collapse: collapse; font-size: 0.9rem; margin: 0.5rem 0; }
th, td { border: 1px solid #d8d8d8; padding: 0.25rem 0.55rem; text-align: right; }
th { background: #f2f4f6; }
td.name, th.name { text-align: left; }
dl.diag { display: grid; grid-template-columns: max-content auto; gap: 0.15rem 1rem;
          font-size: 0.92rem; }
dl.diag dt { color: #555555; }
dl.diag dd { margin: 0; }
.plots { display: flex; flex-wrap: wrap; gap: 0.8rem; }
figure { margin: 0; }
figcaption { font-size: 0.85rem; color: #444444; max-width: 720px; }
img.plot { display: block; max-width: 100%; height: auto; }
ul.warnings li { margin: 0.2rem 0; }
footer { margin-top: 2.5rem; color: #777777; font-size: 0.8rem; }
"""


def render_report(spec: CalibrationSpec, state: EngineState, runs: list[dict[str, Any]]) -> str:
    """Render the calibration's report as one self-contained HTML document.

    Parameters
    ----------
    spec : CalibrationSpec
    state : EngineState
        The latest state; ``state.summary`` follows the API's posterior summary and
        ``state.pool`` holds posterior draws, shape ``(n_draws, n_columns)``, in physical units.
    runs : list of dict
        The API's run records (``run_id``, ``parameters``, ``state``, ``outputs``, ...).

    Returns
    -------
    str
        The HTML page, UTF-8 text with no external references.
    """
    summary = state.summary if isinstance(state.summary, Mapping) else {}
    diagnostics = _mapping(summary.get("diagnostics"))
    columns = spec.names + ([NOISE_SCALE_NAME] if spec.noise_scale == "estimate" else [])
    draws, pool_note = _usable_pool(state.pool, len(columns))
    fitted = state.round > 0
    # The summary's count is of the successful runs the latest fit used; the run records
    # give the count now, which is ahead of it while results arrive between fits.
    runs_fitted = _number(summary.get("runs_completed"))
    done = sum(1 for r in runs if isinstance(r, Mapping) and r.get("state") == "done")
    title = html.escape(spec.name)
    meta = " · ".join(
        [
            f"round {state.round}",
            f"status {html.escape(str(state.status))}",
            f"{done} runs completed",
            f"posterior from {_fmt(runs_fitted if runs_fitted is not None else state.runs_at_fit)}"
            " runs",
        ]
    )
    body = [
        f'<header><h1>{title}</h1><p class="meta">Calibration report · {meta}</p></header>',
        f'<section class="caution" id="caution"><strong>Caution.</strong> {_CAUTION}</section>',
        _warnings_section(diagnostics, fitted, pool_note),
        _summary_section(spec, summary),
        _diagnostics_section(diagnostics),
        _runs_section(runs),
        _marginals_section(spec, columns, draws, fitted),
        _pairs_section(columns, draws, _mapping(summary.get("parameters"))),
        _channels_section(
            spec, _mapping(summary.get("predictive")), _mapping(summary.get("prior_predictive"))
        ),
        _convergence_section(state.history),
        f"<footer>Generated by honing on {datetime.now(UTC).strftime('%Y-%m-%d %H:%M UTC')}."
        "</footer>",
    ]
    return (
        '<!DOCTYPE html>\n<html lang="en">\n<head>\n<meta charset="utf-8">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        f"<title>{title}: calibration report</title>\n<style>{_CSS}</style>\n</head>\n<body>\n"
        + "\n".join(part for part in body if part)
        + "\n</body>\n</html>\n"
    )


# ---------------------------------------------------------------------------------------------
# Text sections


def _warnings_section(diagnostics: Mapping[str, Any], fitted: bool, pool_note: str | None) -> str:
    items = []
    if not fitted:
        items.append(
            "No surrogate has been fitted yet (round 0): the plots and the table show the prior."
        )
    if pool_note:
        items.append(pool_note)
    raw = diagnostics.get("warnings", [])
    if isinstance(raw, Sequence) and not isinstance(raw, str):
        items.extend(str(w) for w in raw)
    if not items:
        return (
            '<section id="warnings"><h2>Warnings</h2>'
            '<p class="note">The engine reported no warnings.</p></section>'
        )
    lis = "".join(f"<li>{html.escape(w)}</li>" for w in items)
    return f'<section id="warnings"><h2>Warnings</h2><ul class="warnings">{lis}</ul></section>'


def _summary_section(spec: CalibrationSpec, summary: Mapping[str, Any]) -> str:
    params = _mapping(summary.get("parameters"))
    if not params:
        return (
            '<section id="summary"><h2>Parameter summary</h2>'
            '<p class="note">No parameter summary is available yet.</p></section>'
        )
    units = {p.name: p.unit for p in spec.parameters}
    show_kl = any(_number(_mapping(v).get("kl_prior")) is not None for v in params.values())
    head = [
        "parameter",
        "unit",
        "mean",
        "sd",
        "median",
        "95% interval",
        "MAP",
        "prior sd",
        "sd / prior sd",
    ]
    if show_kl:
        head.append("information gain (nats)")
    rows = []
    for name, raw in params.items():
        entry = _mapping(raw)
        sd, prior_sd = _number(entry.get("sd")), _number(entry.get("prior_sd"))
        ratio = _number(entry.get("sd_ratio"))
        if ratio is None and sd is not None and prior_sd is not None and prior_sd > 0:
            ratio = sd / prior_sd
        interval = entry.get("ci95")
        if isinstance(interval, Sequence) and not isinstance(interval, str) and len(interval) == 2:
            ci = f"{_fmt(_number(interval[0]))} to {_fmt(_number(interval[1]))}"
        else:
            ci = _DASH
        cells = [
            _fmt(_number(entry.get("mean"))),
            _fmt(sd),
            _fmt(_number(entry.get("median"))),
            ci,
            _fmt(_number(entry.get("map"))),
            _fmt(prior_sd),
            _fmt(ratio),
        ]
        if show_kl:
            cells.append(_fmt(_number(entry.get("kl_prior"))))
        unit = units.get(str(name))
        rows.append(
            f'<tr><td class="name">{html.escape(str(name))}</td>'
            f'<td class="name">{html.escape(unit) if unit else ""}</td>'
            + "".join(f"<td>{c}</td>" for c in cells)
            + "</tr>"
        )
    header = "".join(
        f'<th class="name">{h}</th>' if h in ("parameter", "unit") else f"<th>{h}</th>"
        for h in head
    )
    return (
        '<section id="summary"><h2>Parameter summary</h2>'
        f"<table><thead><tr>{header}</tr></thead><tbody>{''.join(rows)}</tbody></table>"
        '<p class="note">MAP: the most probable value (maximum a posteriori) found by the engine. '
        "sd / prior sd well below 1 means the data constrain the parameter; near 1 means they "
        "say little about it.</p></section>"
    )


_DIAGNOSTIC_LABELS = (
    ("validation_error", "Out-of-sample surrogate error (noise units)"),
    ("trust_mean", "Mean trust of the latest runs"),
    ("posterior_change", "Change from the previous round"),
    ("kl_tolerance", "Change counted as none below"),
    ("surrogate_terms", "Surrogate terms"),
    ("surrogate_degree", "Surrogate degree"),
    ("ess_min", "Smallest effective sample size"),
    ("tau_max", "Longest autocorrelation time"),
    ("failed_fraction", "Share of failed runs at the latest fit"),
    ("converged", "Converged"),
)


def _diagnostics_section(diagnostics: Mapping[str, Any]) -> str:
    items = []
    for key, label in _DIAGNOSTIC_LABELS:
        value = diagnostics.get(key)
        if isinstance(value, bool):
            text = "yes" if value else "no"
        else:
            text = _fmt(_number(value))
        items.append(f"<dt>{label}</dt><dd>{text}</dd>")
    return (
        '<section id="diagnostics"><h2>Diagnostics of the latest round</h2>'
        f'<dl class="diag">{"".join(items)}</dl></section>'
    )


def _runs_section(runs: Sequence[Mapping[str, Any]]) -> str:
    counts = Counter(str(r.get("state", "unknown")) for r in runs if isinstance(r, Mapping))
    order = [*_RUN_STATES, *sorted(s for s in counts if s not in _RUN_STATES)]
    rows = "".join(
        f'<tr><td class="name">{html.escape(s)}</td><td>{counts.get(s, 0)}</td></tr>' for s in order
    )
    return (
        '<section id="runs"><h2>Runs by state</h2>'
        '<table><thead><tr><th class="name">state</th><th>runs</th></tr></thead>'
        f"<tbody>{rows}</tbody>"
        f'<tfoot><tr><th class="name">all</th><th>{sum(counts.values())}</th></tr></tfoot>'
        "</table></section>"
    )


# ---------------------------------------------------------------------------------------------
# Plot sections


def _marginals_section(
    spec: CalibrationSpec, columns: list[str], draws: np.ndarray | None, fitted: bool
) -> str:
    label = "posterior draws" if fitted else "draws before the first fit"
    figures, missing = [], []
    for j, name in enumerate(columns):
        param = spec.parameters[j] if j < spec.dim else None
        column = None if draws is None else draws[:, j]
        if param is None and column is None:
            missing.append(name)
            continue
        fig = _marginal_figure(name, param.unit if param else None, param, column, label)
        what = "prior density" if param else "no stated prior"
        figures.append(
            _figure(fig, "marginal", f"{name}: {label} and {what}", _marginal_caption(name, param))
        )
    note = (
        "Histogram: the draws (area 1). Line: the prior density over its central "
        f"{PRIOR_MASS:.1%} range. A close-up panel appears when the posterior is much narrower "
        "than the prior."
    )
    if missing:
        note += f" No draws yet of {html.escape(', '.join(missing))}, which has no stated prior."
    return (
        '<section id="marginals"><h2>Each parameter: posterior against prior</h2>'
        f'<p class="note">{note}</p><div class="plots">{"".join(figures)}</div></section>'
    )


def _marginal_caption(name: str, param: Parameter | None) -> str:
    if param is None:
        return f"{name}: estimated noise multiplier on every stated sd (no prior density drawn)."
    return f"{name}: {param.prior.kind} prior."


def _marginal_figure(
    name: str, unit: str | None, param: Parameter | None, column: np.ndarray | None, label: str
) -> Figure:
    prior_range = _prior_range(param) if param is not None else None
    span = list(prior_range) if prior_range else []
    post_range = None
    if column is not None:
        post_range = (float(np.quantile(column, 0.0005)), float(np.quantile(column, 0.9995)))
        span += list(post_range)
    close_up = bool(
        post_range
        and prior_range
        and (post_range[1] - post_range[0]) < CLOSE_UP_SHARE * (max(span) - min(span))
    )
    fig = Figure(figsize=(7.4 if close_up else 4.4, 2.7), dpi=DPI, layout="constrained")
    axes = fig.subplots(1, 2) if close_up else [fig.subplots()]
    xlabel = _label(f"{name} [{unit}]" if unit else name, MARGINAL_LABEL_CHARS)
    for k, ax in enumerate(axes):
        lo, hi = _padded(min(span), max(span), 0.0) if span else (0.0, 1.0)
        if k == 1 and post_range:
            lo, hi = _padded(*post_range, 0.15)
        if column is not None:
            ax.hist(
                column,
                bins=40,
                range=post_range,
                density=True,
                histtype="stepfilled",
                color=_POSTERIOR,
                alpha=0.45,
                label=label,
            )
        if param is not None:
            grid = np.linspace(lo, hi, 400)
            with np.errstate(over="ignore", under="ignore"):
                density = np.exp(np.asarray(param.prior.logpdf(grid), dtype=float))
            ax.plot(grid, density, color=_PRIOR, lw=1.6, label="prior density")
        ax.set_xlim(lo, hi)
        ax.set_ylim(bottom=0)
        ax.set_xlabel(xlabel)
        ax.set_yticks([])
        title = _label(name, MARGINAL_LABEL_CHARS)
        ax.set_title("close-up of the posterior" if k == 1 else title, fontsize=10)
    axes[0].legend(fontsize=7, loc="upper right", frameon=False)
    return fig


def _pairs_section(columns: list[str], draws: np.ndarray | None, params: Mapping[str, Any]) -> str:
    head = '<section id="pairs"><h2>Pairs of parameters</h2>'
    if draws is None:
        return head + '<p class="note">No draws to plot yet.</p></section>'
    if len(columns) < 2:
        return head + '<p class="note">Only one parameter: no pairs to plot.</p></section>'
    chosen = list(range(len(columns)))
    notes = []
    if len(chosen) > PAIR_MAX_PARAMETERS:
        # Keep the parameters the data constrain most (smallest sd / prior sd), in spec order.
        def ratio(j: int) -> float:
            value = _number(_mapping(params.get(columns[j])).get("sd_ratio"))
            return value if value is not None else math.inf

        chosen = sorted(sorted(chosen, key=ratio)[:PAIR_MAX_PARAMETERS])
        left = [columns[j] for j in range(len(columns)) if j not in chosen]
        notes.append(
            f"Showing the {PAIR_MAX_PARAMETERS} parameters with the smallest sd / prior sd; "
            f"left out: {', '.join(left)}."
        )
    n = draws.shape[0]
    if n > PAIR_MAX_POINTS:
        rows = np.sort(np.random.default_rng(0).choice(n, PAIR_MAX_POINTS, replace=False))
        notes.append(f"Showing {PAIR_MAX_POINTS:,} of {n:,} draws, picked at random.")
    else:
        rows = np.arange(n)
        notes.append(f"Showing all {n:,} draws.")
    names = [columns[j] for j in chosen]
    # Correlations from every draw, as the posterior summary gives them, not the plotted few.
    corr = _correlation(draws[:, np.array(chosen)])
    fig = _pairs_figure(names, draws[np.ix_(rows, np.array(chosen))], corr)
    caption = (
        "Below the diagonal: draws of each pair; on it: each parameter's histogram; above it: "
        "the correlation of the draws. " + " ".join(notes)
    )
    return (
        head
        + _figure(fig, "pairs", "pairwise scatter of posterior draws", caption)
        + ("</section>")
    )


def _pairs_figure(names: list[str], sample: np.ndarray, corr: np.ndarray) -> Figure:
    k = len(names)
    size = max(4.5, 1.45 * k)
    fig = Figure(figsize=(size, size), dpi=DPI)
    # Fixed margins: constrained layout takes seconds on an 8 by 8 grid.
    margin = 0.55 / size
    fig.subplots_adjust(
        left=1.5 * margin, bottom=1.5 * margin, right=1 - margin / 2, top=1 - margin / 2
    )
    grid = fig.subplots(k, k, squeeze=False, gridspec_kw={"wspace": 0.08, "hspace": 0.08})
    for i in range(k):
        for j in range(k):
            ax: Axes = grid[i, j]
            ax.tick_params(labelsize=6)
            if i == j:
                ax.hist(sample[:, i], bins=30, color=_POSTERIOR, alpha=0.6)
                ax.set_yticks([])
            elif i > j:
                ax.scatter(
                    sample[:, j], sample[:, i], s=2, color=_POSTERIOR, alpha=0.3, rasterized=True
                )
            else:
                ax.set_axis_off()
                ax.text(
                    0.5,
                    0.5,
                    _DASH if math.isnan(corr[i, j]) else f"{corr[i, j]:+.2f}",
                    ha="center",
                    va="center",
                    fontsize=10,
                    transform=ax.transAxes,
                )
            if i == k - 1:
                ax.set_xlabel(_label(names[j], PAIR_LABEL_CHARS), fontsize=7)
            else:
                ax.set_xticklabels([])
            if j == 0 and i > 0:
                ax.set_ylabel(_label(names[i], PAIR_LABEL_CHARS), fontsize=7)
            elif i != j:
                ax.set_yticklabels([])
    return fig


def _correlation(sample: np.ndarray) -> np.ndarray:
    centred = sample - sample.mean(axis=0)
    sd = np.sqrt((centred**2).mean(axis=0))
    with np.errstate(invalid="ignore", divide="ignore"):
        return (centred.T @ centred / sample.shape[0]) / np.outer(sd, sd)


def _channels_section(
    spec: CalibrationSpec, predictive: Mapping[str, Any], prior_predictive: Mapping[str, Any]
) -> str:
    figures = []
    for obs in spec.observations[:CHANNEL_MAX_PLOTS]:
        fig, notes = _channel_figure(
            obs, _mapping(predictive.get(obs.name)), _mapping(prior_predictive.get(obs.name))
        )
        caption = f"{obs.name}: data with ±1 sd error bars. " + " ".join(notes)
        figures.append(_figure(fig, "channel", f"{obs.name}: data and predictive bands", caption))
    left = [o.name for o in spec.observations[CHANNEL_MAX_PLOTS:]]
    extra = (
        f'<p class="note">{len(left)} more channels are not drawn: {html.escape(", ".join(left))}.'
        "</p>"
        if left
        else ""
    )
    if not predictive:
        extra += '<p class="note">No posterior-predictive bands yet (no fit so far).</p>'
    return (
        '<section id="channels"><h2>Observations and predictions</h2>'
        '<p class="note">Points: the data. Blue band and line: the posterior-predictive 95% '
        "band and mean. Orange band: the prior-predictive 95% band.</p>"
        f'{extra}<div class="plots">{"".join(figures)}</div></section>'
    )


def _channel_figure(
    obs: Observation, predictive: Mapping[str, Any], prior_predictive: Mapping[str, Any]
) -> tuple[Figure, list[str]]:
    notes: list[str] = []
    x = obs.coords if obs.coords is not None else np.arange(obs.size, dtype=float)
    order = np.argsort(x, kind="stable")
    if order.size > CHANNEL_MAX_POINTS:
        order = order[:: math.ceil(order.size / CHANNEL_MAX_POINTS)]
        notes.append(f"Showing {order.size:,} of {obs.size:,} points, evenly thinned.")
    xs = x[order]
    fig = Figure(figsize=(5.6, 3.0), dpi=DPI, layout="constrained")
    ax = fig.subplots()
    prior_lo, prior_hi = _band(prior_predictive, obs.size, "lo95", "hi95")
    if prior_lo is not None and prior_hi is not None:
        _draw_band(ax, xs, prior_lo[order], prior_hi[order], _PRIOR, "prior-predictive 95%")
        uncovered = _number(prior_predictive.get("uncovered"))
        if uncovered is not None:
            notes.append(
                f"{_points(int(uncovered))} outside the prior-predictive band (of {obs.size})."
            )
    elif prior_predictive:
        notes.append("The prior-predictive band does not match the data length; not drawn.")
    lo, hi = _band(predictive, obs.size, "lo95", "hi95")
    if lo is not None and hi is not None:
        _draw_band(ax, xs, lo[order], hi[order], _POSTERIOR, "posterior-predictive 95%")
        outside = int(np.sum((obs.values < lo) | (obs.values > hi)))
        notes.append(f"{_points(outside)} outside the posterior band (of {obs.size}).")
    elif predictive:
        notes.append("The posterior-predictive band does not match the data length; not drawn.")
    (mean,) = _band(predictive, obs.size, "mean")
    if mean is not None:
        ax.plot(xs, mean[order], color=_POSTERIOR, lw=1.4, label="posterior-predictive mean")
    if order.size > ERRORBAR_MAX_POINTS:
        ax.plot(xs, obs.values[order], ".", ms=2, color=_DATA, label="data")
        notes.append(
            f"Data drawn without their ± 1 sd bars above {ERRORBAR_MAX_POINTS} points, where "
            "the bars would hide the bands."
        )
    else:
        ax.errorbar(
            xs,
            obs.values[order],
            yerr=obs.sd[order],
            fmt="o",
            ms=3,
            color=_DATA,
            ecolor=_DATA,
            elinewidth=0.8,
            capsize=2,
            label="data ± 1 sd",
        )
    ax.set_title(_tex(obs.name), fontsize=10)
    if obs.coords is not None:
        ax.set_xlabel(_label(obs.coords_label or "coordinate", CHANNEL_LABEL_CHARS))
    else:
        ax.set_xlabel("index")
    if obs.unit:
        ax.set_ylabel(_label(f"{obs.name} [{obs.unit}]", CHANNEL_LABEL_CHARS))
    ax.legend(fontsize=7, frameon=False)
    return fig, notes


def _band(entry: Mapping[str, Any], size: int, *keys: str) -> list[np.ndarray | None]:
    out: list[np.ndarray | None] = []
    for key in keys:
        values = entry.get(key)
        array = None
        if isinstance(values, Sequence) and not isinstance(values, str) and len(values) == size:
            candidate = np.array([_number(v) for v in values], dtype=float)
            array = candidate if np.all(np.isfinite(candidate)) else None
        out.append(array)
    return out


def _draw_band(
    ax: Axes, x: np.ndarray, lo: np.ndarray, hi: np.ndarray, color: str, label: str
) -> None:
    if x.size > 1:
        ax.fill_between(x, lo, hi, color=color, alpha=0.25, lw=0, label=label)
    else:
        ax.vlines(x, lo, hi, color=color, alpha=0.5, lw=8, label=label)


_HISTORY_PANELS = (
    ("validation_error", "out-of-sample error (noise units)", True),
    ("trust_mean", "mean trust of new runs", False),
    ("posterior_change", "change from previous round", True),
    ("runs_completed", "runs completed", False),
)


def _convergence_section(history: Sequence[Mapping[str, Any]]) -> str:
    head = '<section id="convergence"><h2>Progress by round</h2>'
    rounds = [h for h in history if isinstance(h, Mapping)]
    if not rounds:
        return head + '<p class="note">No rounds fitted yet.</p></section>'
    fig = Figure(figsize=(9.0, 5.0), dpi=DPI, layout="constrained")
    axes = fig.subplots(2, 2).ravel()
    for ax, (key, label, log) in zip(axes, _HISTORY_PANELS, strict=True):
        pairs = [
            (r, v)
            for h in rounds
            if (r := _number(h.get("round"))) is not None and (v := _number(h.get(key))) is not None
        ]
        ax.set_title(label, fontsize=10)
        ax.set_xlabel("round")
        if not pairs:
            ax.text(0.5, 0.5, "not recorded", ha="center", va="center", transform=ax.transAxes)
            ax.set_xticks([])
            ax.set_yticks([])
            continue
        xs, ys = zip(*pairs, strict=True)
        ax.plot(xs, ys, "o-", color=_POSTERIOR, ms=4)
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))
        if key == "validation_error":
            ax.axhline(1.0, color="#888888", ls="--", lw=1)
        if log and all(y > 0 for y in ys):
            ax.set_yscale("log")
            _plain_log_labels(ax)
    caption = (
        "Out-of-sample error: RMS of (simulator - surrogate prediction made before the run) / sd "
        "over each round's new runs; the dashed line marks the noise level."
    )
    return head + _figure(fig, "convergence", "diagnostics per round", caption) + "</section>"


# ---------------------------------------------------------------------------------------------
# Helpers


def _plain_log_labels(ax: Axes) -> None:
    """Label a log y axis with plain numbers ("0.05", "2") instead of powers of ten.

    Ticks follow the axis's own range, reference lines included: over less than two decades
    they sit at 1, 2 and 5 times powers of ten, so at least two fall inside; over more, at
    most six powers of ten (a 1e-8 error under the line at 1 once left the axis unlabelled).
    """
    low, high = ax.get_ylim()
    if math.log10(high / low) < 2.0:
        ax.yaxis.set_major_locator(LogLocator(subs=(1.0, 2.0, 5.0)))
    else:
        ax.yaxis.set_major_locator(LogLocator(numticks=6))
    ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
    ax.yaxis.set_minor_formatter(NullFormatter())


def _figure(fig: Figure, kind: str, alt: str, caption: str) -> str:
    """The figure as an inline PNG inside ``<figure>``, with escaped alt text and caption."""
    FigureCanvasAgg(fig)
    buffer = io.BytesIO()
    # No "Software" entry: the PNG then carries no address or version of the plotting library.
    fig.savefig(buffer, format="png", dpi=DPI, metadata={"Software": None})
    data = base64.b64encode(buffer.getvalue()).decode("ascii")
    return (
        f'<figure><img class="plot" data-plot="{kind}" alt="{html.escape(alt)}" '
        f'src="data:image/png;base64,{data}"><figcaption>{html.escape(caption)}</figcaption>'
        "</figure>"
    )


def _usable_pool(pool: Any, n_columns: int) -> tuple[np.ndarray | None, str | None]:
    """The pool's finite rows, or None with a reason when it cannot be plotted."""
    array = np.asarray(pool, dtype=float)
    if array.ndim != 2 or array.shape[0] == 0:
        return None, None
    if array.shape[1] != n_columns:
        return None, (
            f"The posterior draws have {array.shape[1]} columns where {n_columns} were expected; "
            "they are not plotted."
        )
    finite = array[np.all(np.isfinite(array), axis=1)]
    if finite.shape[0] < 2:
        return None, "Fewer than two finite posterior draws: no draws are plotted."
    return finite, None


def _prior_range(param: Parameter) -> tuple[float, float] | None:
    tail = (1.0 - PRIOR_MASS) / 2.0
    lo, hi = np.asarray(param.prior.ppf(np.array([tail, 1.0 - tail])), dtype=float)
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        return None
    return float(lo), float(hi)


def _padded(lo: float, hi: float, share: float) -> tuple[float, float]:
    """``(lo, hi)`` widened by ``share`` of its width; a single point gets a width of its own."""
    width = hi - lo or abs(lo) or 1.0
    return lo - share * width, hi + share * width


def _mapping(value: Any) -> Mapping[str, Any]:
    return value if isinstance(value, Mapping) else {}


def _number(value: Any) -> float | None:
    """A finite float, or None for anything else (missing, null, text, NaN, booleans)."""
    if isinstance(value, bool) or not isinstance(value, int | float | np.number):
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def _fmt(value: float | None) -> str:
    if value is None:
        return _DASH
    if value == int(value) and abs(value) < 1e9:
        return f"{int(value):,}"
    return f"{value:.4g}"


def _points(n: int) -> str:
    return f"{n:,} data point lies" if n == 1 else f"{n:,} data points lie"


def _label(text: str, width: int) -> str:
    """A figure label wrapped to lines of at most ``width`` characters (long names overran
    their panel and the one beside it)."""
    return _tex(textwrap.fill(text, width))


def _tex(text: str) -> str:
    """Text for a matplotlib label: a ``$`` must not start mathematics."""
    return text.replace("$", r"\$")
