"""The report page in a real headless chromium, driven over the DevTools protocol.

How "no outside requests" is checked, and why this way: the page target's ``Network`` events
list every request the page makes, so the test fails on any request whose URL is neither the
report file itself nor an inline ``data:`` image. As a second line, chromium runs behind a proxy
that nothing listens on (``127.0.0.1:9``) and with every host name unresolvable, so a request the
events might not show could never succeed silently: its resource would be missing, which the
image checks and the screenshot would catch. The same flags keep the test off the Internet.
"""

from __future__ import annotations

import base64
import io
import itertools
import json
import os
import re
import shutil
import subprocess
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import websocket
from PIL import Image

from honing.api.report import render_report
from honing.engine.spec import CalibrationSpec
from honing.engine.state import EngineState

pytestmark = pytest.mark.browser

WIDTH = 1200
STARTUP_SECONDS = 30.0
EVENT_SECONDS = 30.0


def _chromium() -> str:
    for name in ("chromium", "chromium-browser", "google-chrome"):
        if path := shutil.which(name):
            return path
    # tests/run installs chromium, so under CI a missing browser is a broken set-up, not a skip.
    if os.environ.get("CI") == "true":
        pytest.fail("chromium is not installed (apt-get install -y chromium)")
    pytest.skip("chromium is not installed (apt-get install -y chromium)")


class _DevTools:
    """A minimal DevTools protocol session on one page target: commands and collected events."""

    def __init__(self, url: str) -> None:
        # suppress_origin: chromium refuses websocket clients that send an Origin header.
        self._ws = websocket.create_connection(
            url, timeout=EVENT_SECONDS, suppress_origin=True, http_no_proxy=["127.0.0.1"]
        )
        self._ids = itertools.count(1)
        self.events: list[dict[str, Any]] = []

    def call(self, method: str, **params: Any) -> dict[str, Any]:
        ident = next(self._ids)
        self._ws.send(json.dumps({"id": ident, "method": method, "params": params}))
        while True:
            message = json.loads(self._ws.recv())
            if message.get("id") == ident:
                assert "error" not in message, f"{method}: {message['error']}"
                return dict(message.get("result", {}))
            if "method" in message:
                self.events.append(message)

    def wait_for(self, method: str) -> None:
        deadline = time.monotonic() + EVENT_SECONDS
        while not any(e["method"] == method for e in self.events):
            assert time.monotonic() < deadline, f"no {method} within {EVENT_SECONDS} s"
            self.events.append(json.loads(self._ws.recv()))

    def close(self) -> None:
        self._ws.close()


@pytest.fixture
def devtools(tmp_path: Path) -> Iterator[_DevTools]:
    profile = tmp_path / "profile"
    profile.mkdir()
    browser = _chromium()  # skips before anything is opened when there is no browser
    with (tmp_path / "chromium.log").open("wb") as log:
        process = subprocess.Popen(
            [
                browser,
                "--headless",
                "--no-sandbox",
                "--disable-gpu",
                "--disable-quic",
                "--no-first-run",
                "--disable-background-networking",
                "--disable-component-update",
                "--disable-sync",
                f"--user-data-dir={profile}",
                "--remote-debugging-port=0",
                "--proxy-server=127.0.0.1:9",
                "--host-resolver-rules=MAP * ~NOTFOUND",
                f"--window-size={WIDTH},900",
                "about:blank",
            ],
            stdout=subprocess.DEVNULL,
            stderr=log,
        )
        session = None
        try:
            session = _DevTools(_page_socket(profile / "DevToolsActivePort", process))
            yield session
        finally:
            if session is not None:
                session.close()
            process.terminate()
            try:
                process.wait(timeout=10)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait()


def _page_socket(port_file: Path, process: subprocess.Popen[bytes]) -> str:
    """The websocket address of chromium's first page, once its DevTools server is up."""
    deadline = time.monotonic() + STARTUP_SECONDS
    while not (port_file.exists() and len(port_file.read_text().splitlines()) >= 2):
        assert process.poll() is None, "chromium exited during start-up"
        assert time.monotonic() < deadline, "chromium's DevTools server did not start"
        time.sleep(0.1)
    port = int(port_file.read_text().splitlines()[0])
    browser = websocket.create_connection(
        f"ws://127.0.0.1:{port}{port_file.read_text().splitlines()[1]}",
        timeout=EVENT_SECONDS,
        suppress_origin=True,
        http_no_proxy=["127.0.0.1"],
    )
    try:
        browser.send(json.dumps({"id": 1, "method": "Target.getTargets"}))
        while True:
            message = json.loads(browser.recv())
            if message.get("id") == 1:
                break
    finally:
        browser.close()
    pages = [t for t in message["result"]["targetInfos"] if t["type"] == "page"]
    assert pages, f"no page target: {message}"
    return f"ws://127.0.0.1:{port}/devtools/page/{pages[0]['targetId']}"


def _report_file(tmp_path: Path) -> Path:
    # An invented two-parameter scenario: a spring stretched by known loads.
    loads = np.linspace(0.0, 9.0, 10)
    spec = CalibrationSpec.from_dict(
        {
            "name": "spring & <bench> test",
            "parameters": [
                {
                    "name": "stiffness",
                    "prior": {"kind": "lognormal", "median": 40, "sigma_log": 0.6},
                },
                {
                    "name": "slack",
                    "prior": {"kind": "uniform", "low": 0, "high": 0.05},
                    "unit": "m",
                },
            ],
            "observations": [
                {
                    "name": "extension",
                    "values": (0.01 + loads / 45.0).round(4).tolist(),
                    "sd": 0.005,
                    "coords": loads.tolist(),
                }
            ],
        }
    )
    rng = np.random.default_rng(11)
    pool = np.column_stack([rng.normal(45.0, 1.5, 2000), rng.normal(0.01, 0.003, 2000)])
    mean = 0.01 + loads / 45.0
    summary = {
        "round": 3,
        "runs_completed": 40,
        "parameters": {
            name: {"mean": float(c.mean()), "sd": float(c.std()), "prior_sd": s}
            for name, c, s in zip(spec.names, pool.T, (27.0, 0.0144), strict=True)
        },
        "diagnostics": {"validation_error": 0.7, "trust_mean": 0.96, "warnings": ["a <b>test</b>"]},
        "predictive": {
            "extension": {
                "mean": mean.tolist(),
                "lo95": (mean - 0.012).tolist(),
                "hi95": (mean + 0.012).tolist(),
            }
        },
        "prior_predictive": {
            "extension": {"lo95": (mean * 0.3).tolist(), "hi95": (mean * 2.5).tolist()}
        },
    }
    history = [
        {"round": r, "runs_completed": 10 * (r + 1), "validation_error": 2.0 / r} for r in (1, 2, 3)
    ]
    state = EngineState(
        round=3,
        status="collecting",
        runs_at_fit=40,
        proposals=np.zeros((0, 2)),
        predictions=np.zeros((0, 10), np.float32),
        pool=pool,
        summary=summary,
        history=history,
        rng=np.random.PCG64(0).state,
    )
    path = tmp_path / "report.html"
    path.write_text(render_report(spec, state, [{"state": "done"}] * 40), encoding="utf-8")
    return path


_IMAGES = """JSON.stringify(Array.from(document.images).map(i => {
  const r = i.getBoundingClientRect();
  return {plot: i.dataset.plot, complete: i.complete, width: i.naturalWidth,
          x: r.left + window.scrollX, y: r.top + window.scrollY, w: r.width, h: r.height};
}))"""


def test_report_renders_offline_without_errors(devtools: _DevTools, tmp_path: Path) -> None:
    report = _report_file(tmp_path)
    for domain in ("Page", "Network", "Runtime", "Log"):
        devtools.call(f"{domain}.enable")
    devtools.call("Page.navigate", url=report.as_uri())
    devtools.wait_for("Page.loadEventFired")

    # A viewport as tall as the page, so that one screenshot shows every plot.
    height = devtools.call("Runtime.evaluate", expression="document.body.scrollHeight")
    devtools.call(
        "Emulation.setDeviceMetricsOverride",
        width=WIDTH,
        height=int(height["result"]["value"]) + 20,
        deviceScaleFactor=1,
        mobile=False,
    )
    images = json.loads(devtools.call("Runtime.evaluate", expression=_IMAGES)["result"]["value"])
    shot = devtools.call("Page.captureScreenshot", format="png", captureBeyondViewport=True)

    requests = [
        e["params"]["request"]["url"]
        for e in devtools.events
        if e["method"] == "Network.requestWillBeSent"
    ]
    outside = [u for u in requests if u != report.as_uri() and not u.startswith("data:")]
    assert report.as_uri() in requests, requests[:5]
    assert not outside, outside
    failed = [e["params"] for e in devtools.events if e["method"] == "Network.loadingFailed"]
    assert not failed, failed
    errors = [
        e["params"]
        for e in devtools.events
        if e["method"] == "Runtime.exceptionThrown"
        or (
            e["method"] == "Runtime.consoleAPICalled" and e["params"]["type"] in ("error", "assert")
        )
        or (e["method"] == "Log.entryAdded" and e["params"]["entry"]["level"] == "error")
    ]
    assert not errors, errors

    # Two marginals, one pair grid, one channel, one progress figure; all decoded by the browser.
    assert sorted(i["plot"] for i in images) == [
        "channel",
        "convergence",
        "marginal",
        "marginal",
        "pairs",
    ], images
    assert all(i["complete"] and i["width"] > 0 for i in images), images
    png = base64.b64decode(shot["data"])
    (tmp_path / "screenshot.png").write_bytes(png)
    pixels = np.asarray(Image.open(io.BytesIO(png)).convert("L"), dtype=float)
    sources = re.findall(r'src="data:image/png;base64,([^"]+)"', report.read_text("utf-8"))
    assert len(sources) == len(images)
    for image, source in zip(images, sources, strict=True):
        x, y, w, h = (round(image[k]) for k in ("x", "y", "w", "h"))
        region = pixels[y : y + h, x : x + w]
        assert w > 200 and h > 150, f"{image['plot']} is drawn too small: {image}"
        # Even empty axes frames ink over 1 % of a plot; a blank or missing image inks none.
        inked = np.count_nonzero(region < 200) / region.size
        assert inked > 0.01, f"{image['plot']} region is nearly blank ({inked:.1%} inked)"
        # What the browser painted there is the plot itself: close to the PNG, resized to fit.
        expected = Image.open(io.BytesIO(base64.b64decode(source))).convert("L").resize((w, h))
        difference = np.abs(region - np.asarray(expected, dtype=float)).mean()
        assert difference < 12.0, f"{image['plot']} differs from its PNG by {difference:.1f}/255"
