from __future__ import annotations

import base64
import io
import re
from html.parser import HTMLParser
from typing import Any

import numpy as np
import pytest
from PIL import Image

from honing.api import report
from honing.api.report import render_report
from honing.engine.spec import CalibrationSpec
from honing.engine.state import EngineState

# An invented scenario: a tank cooling towards room temperature, watched by two probes.
HOSTILE_NAME = '<script>alert("x")</script> tank & "lid" $5'
HOSTILE_UNIT = "<b>W/K</b> & $"
HOSTILE_WARNING = "<img src=x onerror=alert(1)> too few runs & more"

_VOID = {"meta", "img", "br", "hr", "input", "link", "col", "wbr", "source", "area", "base"}


def _spec(name: str = "cooling-tank", noise: str = "estimate", n_extra: int = 0) -> CalibrationSpec:
    params: list[dict[str, Any]] = [
        {"name": "conductance", "prior": {"kind": "lognormal", "median": 2.0, "sigma_log": 0.5}},
        {"name": "heat_capacity", "prior": {"kind": "normal", "mean": 4000.0, "sd": 600.0}},
        {"name": "offset", "prior": {"kind": "uniform", "low": -1.0, "high": 1.0}, "unit": "K"},
    ]
    params[0]["unit"] = HOSTILE_UNIT
    params += [
        {"name": f"extra_{i}", "prior": {"kind": "normal", "mean": 0.0, "sd": 1.0}}
        for i in range(n_extra)
    ]
    times = np.arange(20) * 30.0
    return CalibrationSpec.from_dict(
        {
            "name": name,
            "parameters": params,
            "observations": [
                {
                    "name": "probe_top",
                    "values": (20.0 + 15.0 * np.exp(-times / 250.0)).round(2).tolist(),
                    "sd": 0.3,
                    "coords": times.tolist(),
                },
                {
                    "name": "probe_bottom",
                    "values": [31.0, 29.5, 27.9, 26.8, 25.6, 24.9, 24.1, 23.3, 22.9, 22.4],
                    "sd": [0.4] * 10,
                },
            ],
            "noise": {"scale": noise},
        }
    )


def _summary_entry(column: np.ndarray, prior_sd: float) -> dict[str, Any]:
    sd = float(column.std())
    return {
        "mean": float(column.mean()),
        "sd": sd,
        "median": float(np.median(column)),
        "ci95": [float(np.quantile(column, 0.025)), float(np.quantile(column, 0.975))],
        "map": float(np.median(column)),
        "prior_sd": prior_sd,
        "sd_ratio": sd / prior_sd,
        "kl_prior": 1.2,
    }


def _state(spec: CalibrationSpec, fitted: bool = True, n_draws: int = 4000) -> EngineState:
    rng = np.random.default_rng(3)
    columns = spec.names + (["noise_scale"] if spec.noise_scale == "estimate" else [])
    if not fitted:
        return EngineState(
            round=0,
            status="collecting",
            runs_at_fit=0,
            proposals=np.zeros((0, spec.dim)),
            predictions=np.zeros((0, spec.output_size), np.float32),
            pool=np.zeros((0, len(columns))),
            summary={
                "round": 0,
                "runs_completed": 0,
                "status": "collecting",
                "parameters": {
                    p.name: {"mean": p.prior.mean, "sd": p.prior.sd, "prior_sd": p.prior.sd}
                    for p in spec.parameters
                },
                "diagnostics": {"trust_mean": None, "validation_error": None},
                "predictive": {},
            },
            history=[],
            rng=np.random.PCG64(0).state,
        )
    base = rng.standard_normal((n_draws, len(columns)))
    pool = np.empty_like(base)
    pool[:, 0] = 2.3 + 0.04 * base[:, 0]
    pool[:, 1] = 4200.0 + 250.0 * (0.8 * base[:, 0] + 0.6 * base[:, 1])
    pool[:, 2] = 0.1 + 0.2 * base[:, 2]
    for j in range(3, spec.dim):
        pool[:, j] = (0.2 + 0.05 * j) * base[:, j]
    if spec.noise_scale == "estimate":
        pool[:, -1] = np.exp(0.1 + 0.1 * base[:, -1])
    prior_sd = [p.prior.sd for p in spec.parameters] + [0.5]
    predictive = {}
    for obs in spec.observations:
        mean = obs.values + 0.1
        predictive[obs.name] = {
            "mean": mean.tolist(),
            "lo95": (mean - 0.8).tolist(),
            "hi95": (mean + 0.8).tolist(),
        }
    prior_predictive = {
        obs.name: {
            "lo95": (obs.values - 6).tolist(),
            "hi95": (obs.values + 6).tolist(),
            "uncovered": 0,
        }
        for obs in spec.observations
    }
    history = [
        {
            "round": r,
            "runs_completed": 24 + 12 * (r - 1),
            "validation_error": 3.0 / r,
            "trust_mean": min(0.99, 0.5 + 0.15 * r),
            "posterior_change": None if r == 1 else 1.0 / r**2,
            "surrogate_terms": 10 + 4 * r,
        }
        for r in range(1, 6)
    ]
    return EngineState(
        round=5,
        status="collecting",
        runs_at_fit=72,
        proposals=np.zeros((4, spec.dim)),
        predictions=np.zeros((4, spec.output_size), np.float32),
        pool=pool,
        summary={
            "round": 5,
            "runs_completed": 72,
            "status": "collecting",
            "parameters": {
                name: _summary_entry(pool[:, j], prior_sd[j]) for j, name in enumerate(columns)
            },
            "diagnostics": {
                "trust_mean": 0.95,
                "validation_error": 0.6,
                "posterior_change": 0.04,
                "surrogate_terms": 30,
                "surrogate_degree": 4,
                "converged": False,
                "ess_min": 812.0,
                "tau_max": 31.5,
                "failed_fraction": 0.03,
                "warnings": [HOSTILE_WARNING],
            },
            "predictive": predictive,
            "prior_predictive": prior_predictive,
        },
        history=history,
        rng=np.random.PCG64(0).state,
    )


def _runs() -> list[dict[str, Any]]:
    states = ["done"] * 70 + ["failed"] * 2 + ["leased"] * 4 + ["expired", "<odd>"]
    return [
        {"run_id": f"r{i}", "parameters": {}, "state": s, "outputs": None, "error": None}
        for i, s in enumerate(states)
    ]


class _Checker(HTMLParser):
    """Records start tags and attributes, and every nesting error."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.stack: list[str] = []
        self.errors: list[str] = []
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append((tag, dict(attrs)))
        if tag not in _VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag: str) -> None:
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes {self.stack[-1:] or 'nothing'}")
        else:
            self.stack.pop()

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def _parse(page: str) -> _Checker:
    checker = _Checker()
    checker.feed(page)
    checker.close()
    assert not checker.errors, checker.errors
    assert not checker.stack, f"unclosed tags: {checker.stack}"
    return checker


def _plots(checker: _Checker) -> list[str]:
    return [str(a.get("data-plot")) for tag, a in checker.tags if tag == "img"]


@pytest.fixture(scope="module")
def fitted_page() -> str:
    spec = _spec(name=HOSTILE_NAME)
    return render_report(spec, _state(spec), _runs())


def test_page_is_well_formed_with_one_image_per_plot(fitted_page: str) -> None:
    checker = _parse(fitted_page)
    assert fitted_page.startswith("<!DOCTYPE html>")
    plots = _plots(checker)
    # Three parameters plus noise_scale, one pair grid, two channels, one progress figure.
    assert plots.count("marginal") == 4, plots
    assert plots.count("pairs") == 1, plots
    assert plots.count("channel") == 2, plots
    assert plots.count("convergence") == 1, plots
    assert len(plots) == 8, plots


def test_images_are_inline_pngs_with_content(fitted_page: str) -> None:
    for tag, attrs in _parse(fitted_page).tags:
        if tag != "img":
            continue
        src = str(attrs["src"])
        assert src.startswith("data:image/png;base64,"), src[:40]
        image = Image.open(io.BytesIO(base64.b64decode(src.split(",", 1)[1]))).convert("L")
        dark = np.count_nonzero(np.asarray(image) < 200)
        assert image.width > 200 and image.height > 150, image.size
        assert dark > 0.005 * image.width * image.height, f"{attrs['data-plot']} looks blank"


def test_no_external_references(fitted_page: str) -> None:
    checker = _parse(fitted_page)
    assert "http://" not in fitted_page and "https://" not in fitted_page
    assert "url(" not in fitted_page
    for tag, attrs in checker.tags:
        assert tag not in {"script", "link", "iframe", "object", "embed"}, tag
        assert "href" not in attrs, (tag, attrs)
        assert str(attrs.get("src", "data:")).startswith("data:"), (tag, attrs)


def test_user_text_is_escaped(fitted_page: str) -> None:
    checker = _parse(fitted_page)
    assert "<script>" not in fitted_page and "<b>W/K</b>" not in fitted_page
    assert "<img src=x" not in fitted_page and "<odd>" not in fitted_page
    assert not {tag for tag, _ in checker.tags} & {"script", "b"}
    text = "".join(checker.text)
    for raw in (HOSTILE_NAME, HOSTILE_UNIT, HOSTILE_WARNING, "<odd>"):
        assert raw in text, raw


def test_tables_and_caution(fitted_page: str) -> None:
    text = " ".join("".join(_parse(fitted_page).text).split())
    for heading in ("mean", "sd", "median", "95% interval", "MAP", "prior sd", "sd / prior sd"):
        assert heading in text, heading
    assert "independent measurements" in text and "licensed engineering practice" in text
    runs = re.search(r"done\s*70", text)
    assert runs, "runs-by-state count for done"
    assert re.search(r"all\s*78", text), "total run count"


def test_round_zero_shows_the_prior_only() -> None:
    spec = _spec()
    checker = _parse(render_report(spec, _state(spec, fitted=False), []))
    plots = _plots(checker)
    # noise_scale has neither draws nor a stated prior yet: a note instead of an empty plot.
    assert plots.count("marginal") == 3 and plots.count("channel") == 2, plots
    assert "pairs" not in plots and "convergence" not in plots, plots
    text = " ".join("".join(checker.text).split())
    assert "round 0" in text and "No rounds fitted yet" in text
    assert "No draws yet of noise_scale" in text


@pytest.mark.parametrize(
    "summary",
    [
        {},
        {"parameters": {"conductance": {"mean": 2.0}}, "diagnostics": None},
        {"diagnostics": {"warnings": "not a list"}, "predictive": {"probe_top": {"mean": [1.0]}}},
        {"predictive": {"probe_top": {"lo95": [0.0] * 20, "hi95": ["x"] * 20}}},
    ],
)
def test_partial_summaries_render(summary: dict[str, Any]) -> None:
    spec = _spec(noise="fixed")
    state = _state(spec)
    state.summary = summary
    state.history = [{"round": 1}, {"round": 2, "validation_error": None, "trust_mean": 0.9}]
    checker = _parse(render_report(spec, state, [{"state": "done"}]))
    assert _plots(checker).count("marginal") == 3


def test_pool_with_wrong_width_is_reported_not_plotted() -> None:
    spec = _spec(noise="fixed")
    state = _state(spec)
    state.pool = np.zeros((50, 7))
    checker = _parse(render_report(spec, state, []))
    assert "pairs" not in _plots(checker)
    assert "7 columns where 3 were expected" in "".join(checker.text)


def test_large_calibrations_say_what_is_left_out(monkeypatch: pytest.MonkeyPatch) -> None:
    # Smaller caps than the real ones keep the test quick; the logic is the same.
    monkeypatch.setattr(report, "PAIR_MAX_PARAMETERS", 8)
    monkeypatch.setattr(report, "PAIR_MAX_POINTS", 1000)
    spec = _spec(noise="fixed", n_extra=8)
    state = _state(spec, n_draws=1500)
    text = " ".join("".join(_parse(render_report(spec, state, [])).text).split())
    assert "Showing 1,000 of 1,500 draws" in text
    # The last extra parameters have the largest sd / prior sd, so they are the ones left out.
    assert "left out: extra_5, extra_6, extra_7" in text


def test_many_channels_are_capped(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(report, "CHANNEL_MAX_PLOTS", 3)
    base = _spec(noise="fixed").to_dict()
    base["observations"] = [
        {"name": f"probe_{i}", "values": [1.0, 2.0], "sd": 0.1} for i in range(5)
    ]
    spec = CalibrationSpec.from_dict(base)
    state = _state(spec)
    state.summary["predictive"] = {}
    state.summary.pop("prior_predictive")
    checker = _parse(render_report(spec, state, []))
    assert _plots(checker).count("channel") == 3
    assert "2 more channels are not drawn: probe_3, probe_4." in "".join(checker.text)


def test_header_gives_the_runs_now_and_the_runs_the_posterior_used(fitted_page: str) -> None:
    # The state's summary was fitted on 72 runs; the run records show 70 done since.
    text = " ".join("".join(_parse(fitted_page).text).split())
    assert "70 runs completed" in text and "posterior from 72 runs" in text


def test_pair_correlations_come_from_every_draw(monkeypatch: pytest.MonkeyPatch) -> None:
    # Only 500 of the 4,000 draws are plotted; the printed correlations must still be those
    # of all draws (numpy.corrcoef), as the posterior summary gives them.
    monkeypatch.setattr(report, "PAIR_MAX_POINTS", 500)
    seen: list[np.ndarray] = []
    draw = report._pairs_figure

    def spy(names: list[str], sample: np.ndarray, corr: np.ndarray) -> Any:
        seen.append(corr)
        return draw(names, sample, corr)

    monkeypatch.setattr(report, "_pairs_figure", spy)
    spec = _spec(noise="fixed")
    state = _state(spec)
    render_report(spec, state, [])
    np.testing.assert_allclose(seen[0], np.corrcoef(state.pool, rowvar=False), atol=1e-12)


@pytest.mark.parametrize("values", [[2e-8, 1.5e-9], [1e-14, 3e-13], [0.5, 0.3], [3.0, 0.02]])
def test_log_axes_are_labelled_whatever_their_range(values: list[float]) -> None:
    # The error panel draws a reference line at 1; a 1e-8 error under it once left the axis
    # with no labels at all.
    fig = report.Figure()
    ax = fig.subplots()
    ax.plot(range(len(values)), values)
    ax.axhline(1.0)
    ax.set_yscale("log")
    report._plain_log_labels(ax)
    report.FigureCanvasAgg(fig).draw()
    low, high = ax.get_ylim()
    shown = [t for t in ax.get_yticklabels() if t.get_text() and low <= t.get_position()[1] <= high]
    assert len(shown) >= 2


def _long_spec(points: int) -> CalibrationSpec:
    return CalibrationSpec.from_dict(
        {
            "name": "long",
            "parameters": [
                {
                    "name": "hydraulic_conductivity_of_the_lower_aquifer_layer_in_situ",
                    "prior": {"kind": "normal", "mean": 2.0, "sd": 2.0},
                    "unit": "m/s",
                }
            ],
            "observations": [{"name": "head", "values": [0.0] * points, "sd": 0.1}],
        }
    )


def test_long_names_wrap_inside_their_panel() -> None:
    spec = _long_spec(5)
    column = np.random.default_rng(0).normal(2.0, 0.05, 2000)
    fig = report._marginal_figure(
        spec.names[0], "m/s", spec.parameters[0], column, "posterior draws"
    )
    labels = [ax.get_xlabel() for ax in fig.axes] + [ax.get_title() for ax in fig.axes]
    assert all(len(line) <= report.MARGINAL_LABEL_CHARS for t in labels for line in t.split("\n"))
    assert "".join(fig.axes[0].get_xlabel().split("\n")) == f"{spec.names[0]} [m/s]"


@pytest.mark.parametrize("points", [20, 1000])
def test_error_bars_only_where_they_leave_the_bands_visible(points: int) -> None:
    spec = _long_spec(points)
    fig, notes = report._channel_figure(spec.observations[0], {}, {})
    bars = [c for c in fig.axes[0].containers if c.has_yerr]
    assert len(bars) == (1 if points <= report.ERRORBAR_MAX_POINTS else 0)
    assert any("without their ± 1 sd bars" in n for n in notes) == (bars == [])


def test_channel_axes_carry_the_observation_labels() -> None:
    data = _long_spec(5).to_dict()
    data["observations"][0].update(
        coords=[0.1, 0.2, 0.3, 0.4, 0.5], unit="m", coords_label="time [d]"
    )
    obs = CalibrationSpec.from_dict(data).observations[0]
    fig, _ = report._channel_figure(obs, {}, {})
    assert (fig.axes[0].get_xlabel(), fig.axes[0].get_ylabel()) == ("time [d]", "head [m]")
