"""The comparison report: its content, and that it renders in headless Chromium with no network.

Chromium is driven over its DevTools protocol on a pipe (--remote-debugging-pipe: fd 3 in, fd 4
out, messages separated by NUL bytes), which needs nothing beyond the standard library. Every
request the page makes is recorded (Network.requestWillBeSent) and any that is not the page file
itself fails the test; in addition the browser runs with a dead proxy and a host resolver that
resolves nothing, so no request could leave the machine even if one were made.
"""

from __future__ import annotations

import fcntl
import json
import os
import queue
import shutil
import subprocess
import tempfile
import threading
from dataclasses import dataclass, field
from pathlib import Path

import pytest
from plotly.offline import get_plotlyjs

from tonebench.report.comparison import MAX_DEVICE_TRACES, render_compare_page, write_compare_report
from tonebench.catalog.limits import LimitRule, add_limit
from tonebench.catalog.query import ResultFilter, ResultRow, find_results
from tonebench.catalog.synthetic import Layout, fill
from tonebench.errors import InputError
from tonebench.store import open_database, session_factory

TIMEOUT_S = 60.0
LAYOUT = Layout(centers_hz=(2.40e9, 2.45e9, 2.50e9), spacings_hz=(1.0e6, 10.0e6), biases_v=(None, 3.3),
                tones_dbm=(-30.0, -20.0, -10.0))


def chromium_binary() -> str:
    found = shutil.which("chromium") or shutil.which("chromium-browser")
    if found is None:
        if os.environ.get("TONEBENCH_REQUIRE_POSTGRES") == "1":  # CI installs chromium and sets this
            pytest.fail("chromium not found (apt-get install chromium)")
        pytest.skip("chromium not found")
    return found


@dataclass
class PageLoad:
    requests: list[str] = field(default_factory=list)
    exceptions: list[str] = field(default_factory=list)
    state: dict = field(default_factory=dict)


# What the page looks like once plotly has drawn: figures, drawn figures, markers, boxes.
STATE_JS = """new Promise(done => setTimeout(done, 250)).then(() => JSON.stringify({
  figures: document.querySelectorAll('div.figure').length,
  drawn: [...document.querySelectorAll('div.figure .js-plotly-plot')].filter(d => d.querySelector('svg.main-svg .cartesianlayer')).length,
  points: document.querySelectorAll('.scatterlayer .point').length,
  boxes: document.querySelectorAll('.boxlayer .trace').length,
  titles: [...document.querySelectorAll('.gtitle')].map(t => t.textContent),
}))"""


class DevTools:
    """A minimal DevTools protocol client over Chromium's pipe."""

    def __init__(self, binary: str, profile: str):
        to_browser_r, self._to_browser = os.pipe()
        self._from_browser, from_browser_w = os.pipe()

        def child_fds():
            # Chromium reads fd 3 and writes fd 4; copy high first so the two cannot clobber each other.
            read_fd = fcntl.fcntl(to_browser_r, fcntl.F_DUPFD, 10)
            write_fd = fcntl.fcntl(from_browser_w, fcntl.F_DUPFD, 10)
            os.dup2(read_fd, 3)
            os.dup2(write_fd, 4)

        self.process = subprocess.Popen(
            [binary, "--headless", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage", "--disable-quic",
             "--no-first-run", "--disable-background-networking", "--disable-component-update", "--disable-sync",
             "--disable-default-apps", f"--user-data-dir={profile}", "--proxy-server=http://127.0.0.1:9",
             "--host-resolver-rules=MAP * ~NOTFOUND, EXCLUDE localhost", "--remote-debugging-pipe", "about:blank"],
            pass_fds=(3, 4), preexec_fn=child_fds, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL)
        os.close(to_browser_r)
        os.close(from_browser_w)
        self._messages: queue.Queue = queue.Queue()
        self._next_id = 0
        self.events: list[dict] = []
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()

    def _read(self) -> None:
        buffer = b""
        while chunk := os.read(self._from_browser, 1 << 16):
            buffer += chunk
            *messages, buffer = buffer.split(b"\0")
            for message in messages:
                self._messages.put(json.loads(message))
        self._messages.put(None)

    def _next_message(self) -> dict:
        message = self._messages.get(timeout=TIMEOUT_S)
        if message is None:
            raise RuntimeError("chromium closed the DevTools pipe")
        return message

    def call(self, method: str, params: dict | None = None, session: str | None = None) -> dict:
        self._next_id += 1
        message = {"id": self._next_id, "method": method, "params": params or {}}
        if session:
            message["sessionId"] = session
        os.write(self._to_browser, json.dumps(message).encode() + b"\0")
        while True:
            reply = self._next_message()
            if reply.get("id") == self._next_id:
                if "error" in reply:
                    raise RuntimeError(f"{method}: {reply['error']}")
                return reply["result"]
            self.events.append(reply)

    def wait_for(self, method: str) -> None:
        while not any(e.get("method") == method for e in self.events):
            self.events.append(self._next_message())

    def close(self) -> None:
        try:
            self.call("Browser.close")
        except (RuntimeError, queue.Empty, OSError):
            pass
        try:
            self.process.wait(timeout=20)
        except subprocess.TimeoutExpired:
            self.process.kill()
            self.process.wait()
        os.close(self._to_browser)
        self._reader.join(timeout=10)  # ends at end of file, once the browser has gone
        os.close(self._from_browser)


def load_in_chromium(page: Path, tmp_path: Path, want_figures: int | None = None) -> PageLoad:
    """Open a file in headless Chromium; return its requests, script errors and drawn state."""
    tools = DevTools(chromium_binary(), tempfile.mkdtemp(dir=tmp_path, prefix="profile-"))
    try:
        target = tools.call("Target.createTarget", {"url": "about:blank"})["targetId"]
        session = tools.call("Target.attachToTarget", {"targetId": target, "flatten": True})["sessionId"]
        for domain in ("Network", "Page", "Runtime"):
            tools.call(f"{domain}.enable", session=session)
        tools.call("Page.navigate", {"url": page.resolve().as_uri()}, session=session)
        tools.wait_for("Page.loadEventFired")
        state = {}
        for _ in range(40):  # each evaluation waits 250 ms in the page
            reply = tools.call("Runtime.evaluate", {"expression": STATE_JS, "awaitPromise": True,
                                                    "returnByValue": True}, session=session)
            state = json.loads(reply["result"]["value"])
            if want_figures is None or state["drawn"] >= want_figures:
                break
        return PageLoad(
            requests=[e["params"]["request"]["url"] for e in tools.events if e.get("method") == "Network.requestWillBeSent"],
            exceptions=[json.dumps(e["params"])[:300] for e in tools.events if e.get("method") == "Runtime.exceptionThrown"],
            state=state)
    finally:
        tools.close()


def leaving_requests(load: PageLoad, page: Path) -> list[str]:
    """Requests other than the page itself (inline data: and blob: URLs never leave the page)."""
    return [url for url in load.requests if url != page.resolve().as_uri() and not url.startswith(("data:", "blob:"))]


@pytest.fixture
def database(tmp_path):
    engine = open_database(f"sqlite:///{tmp_path / 'catalog.db'}")
    fill(engine, 9, seed=4, layout=LAYOUT, n_lots=3, flag_fraction=0.4)
    with session_factory(engine).begin() as session:
        add_limit(session, "QMX-4410", "iip3_dbm", min_value=3.5, freq_min_hz=2.3e9, freq_max_hz=2.6e9)
    yield engine
    engine.dispose()


def test_report_renders_in_chromium_without_network(database, tmp_path):
    page = tmp_path / "compare.html"
    with session_factory(database)() as session:
        rows = find_results(session, ResultFilter())
        write_compare_report(session, ResultFilter(), page)
    load = load_in_chromium(page, tmp_path, want_figures=7)
    assert leaving_requests(load, page) == []
    assert load.requests == [page.resolve().as_uri()]
    assert load.exceptions == []
    # frequency, spacing, bias, lots, distribution, wafer maps, asymmetry: every figure drawn
    assert load.state["figures"] == load.state["drawn"] == 7, load.state
    assert any(title.startswith("Wafer maps") for title in load.state["titles"])
    assert any("empirical CDF" in title for title in load.state["titles"])
    plotted = sum(1 for r in rows if r.iip3_dbm is not None)
    assert load.state["points"] >= 2 * plotted  # IIP3 and OIP3 of each result, at least
    assert load.state["boxes"] == len({(r.part_number, r.lot) for r in rows})
    assert any("spacing" in title for title in load.state["titles"])


def test_the_network_check_sees_a_page_that_reaches_out(tmp_path):
    # Shows the check above can fail: a page with a remote script and image is caught.
    page = tmp_path / "leaky.html"
    page.write_text('<html><head><script src="https://cdn.example.invalid/lib.js"></script></head>'
                    '<body><img src="http://img.example.invalid/a.png"><p>hello</p></body></html>')
    load = load_in_chromium(page, tmp_path)
    assert sorted(leaving_requests(load, page)) == ["http://img.example.invalid/a.png",
                                                    "https://cdn.example.invalid/lib.js"]
    assert load.state["drawn"] == 0


def row(serial: str, lot: str, iip3: float | None, flags=(), bias=None, part="QMX-4410") -> ResultRow:
    return ResultRow(
        result_id=0, run_guid="0f0e0d0c-0000-4000-8000-000000000000", started_at=None, part_number=part,
        serial=serial, lot=lot, wafer="W01", position=None, tags=(), center_hz=2.45e9, spacing_hz=1e6,
        bias_v=bias, gain_db=14.0, iip3_dbm=iip3, iip3_lower_dbm=None if iip3 is None else iip3 - 0.2,
        iip3_upper_dbm=None if iip3 is None else iip3 + 0.2, oip3_dbm=None if iip3 is None else iip3 + 14.0,
        oip3_lower_dbm=None, oip3_upper_dbm=None, p1db_in_dbm=None, iip2_dbm=None, iip3_bound_db=None,
        n_valid=5, n_points=9, verdict="pass", verdict_detail=None, reason=None, flags=tuple(flags))


def test_page_content_flagged_apart_escaped_and_self_contained():
    rows = [row("S1", "L1", 4.0), row("S2", "L1", 4.5, flags=("analyzer-limited",)),
            row("<script>alert(1)</script>", "L2", 5.0, flags=("slope",)), row("S4", "L2", None)]
    limits = {"QMX-4410": [LimitRule(7, "iip3_dbm", 3.5, None, 2.3e9, 2.6e9)]}
    page = render_compare_page(rows, limits, "lots L1, L2")
    assert page.count(get_plotlyjs()[:500]) == 1  # plotly.js embedded once
    assert "<script src" not in page
    assert "<script>alert(1)</script>" not in page  # device text is escaped, in HTML and in plot data
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in page
    flagged_table = page[page.index("Flagged results"):]
    assert "QMX-4410 S2" in flagged_table and "analyzer-limited" in flagged_table
    assert "QMX-4410 S1" not in flagged_table
    assert "QMX-4410 IIP3 min +3.5 dBm, 2.300-2.600 GHz" in page
    assert "4 (1 without a fitted IIP3, not plotted)" in page
    assert "No result in this selection was measured with a bias" in page


def test_many_devices_are_drawn_per_lot_and_an_empty_query_is_refused():
    many = [row(f"S{i:03d}", f"L{i % 3}", 4.0 + i / 100) for i in range(MAX_DEVICE_TRACES + 1)]
    page = render_compare_page(many, {}, "all results")
    assert "one trace per lot: too many devices" in page
    few = render_compare_page(many[:MAX_DEVICE_TRACES], {}, "all results")
    assert "one trace per lot" not in few
    with pytest.raises(InputError, match="matched no results"):
        render_compare_page([], {}, "lots NOPE")


def test_a_device_has_one_colour_in_both_panels():
    from tonebench.report.comparison import _against

    rows = [row("S1", "L1", 4.0), row("S2", "L1", 4.5), row("S3", "L2", 5.0)]
    fig = _against(rows, "center_hz", 1e9, "center frequency (GHz)", "Intercepts against frequency")
    by_device: dict[str, set[str]] = {}
    for trace in fig.data:
        by_device.setdefault(trace.legendgroup, set()).add(trace.marker.color)
    assert len(by_device) == 3
    assert all(len(colors) == 1 for colors in by_device.values())  # IIP3 and OIP3 drawn alike
    assert len({next(iter(colors)) for colors in by_device.values()}) == 3  # and devices apart


def test_no_two_devices_share_a_style_and_each_keeps_it_in_every_panel():
    from tonebench.report.comparison import _against, series_styles

    rows = [row(f"S{i:02d}", f"L{i % 3}", 4.0 + i / 10, bias=0.5 if i % 2 else None) for i in range(25)]
    styles = series_styles(rows)
    assert len(set(styles.values())) == 25  # 25 devices: colours repeat past ten, shapes then differ
    by_frequency = _against(rows, "center_hz", 1e9, "GHz", "f", styles=styles)
    by_bias = _against([r for r in rows if r.bias_v is not None], "bias_v", 1.0, "V", "b", styles=styles)
    for fig in (by_frequency, by_bias):
        for trace in fig.data:
            assert (trace.marker.color, trace.marker.symbol) == styles[trace.legendgroup]


def test_a_device_measured_twice_shows_its_latest_run_unless_all_runs():
    import datetime as dt

    from tonebench.catalog.query import latest_per_device

    first, second, other = row("S1", "L1", 4.0), row("S1", "L1", 4.6), row("S2", "L1", 5.0)
    first.started_at, second.started_at = dt.datetime(2026, 11, 2), dt.datetime(2026, 11, 30)
    other.started_at = dt.datetime(2026, 10, 1)
    first.run_guid, second.run_guid = "aaaa" + first.run_guid[4:], "bbbb" + first.run_guid[4:]
    kept, left_out = latest_per_device([second, first, other])
    assert kept == [second, other] and left_out == 1
    page = render_compare_page(kept, {}, "all", left_out)
    assert "1 results of earlier runs left out" in page
    assert "every run" in render_compare_page([second, first, other], {}, "all", -1)


def test_die_positions_and_the_wafer_map_outline_each_verdict():
    from tonebench.report.lot_plots import die_xy, wafer_maps

    assert die_xy("R12C7") == (7, 12) and die_xy("x3y-4") == (3, -4) and die_xy(" 3, -4 ") == (3, -4)
    assert die_xy("centre") is None and die_xy(None) is None
    rows = [row(f"S{i}", "L1", 4.0 + i) for i in range(3)] + [row("S9", "L1", 6.0)]
    for r, position, verdict in zip(rows, ("R1C1", "R1C2", "R2C1", "near the flat"), ("pass", "fail", None, "pass")):
        r.position, r.verdict = position, verdict
    fig, note = wafer_maps(rows)
    (trace,) = fig.data  # one wafer
    assert list(zip(trace.x, trace.y)) == [(1, 1), (2, 1), (1, 2)]
    assert list(trace.marker.color) == [4.0, 5.0, 6.0]
    assert list(trace.marker.line.color) == ["#2a8a4a", "#d01c1c", "rgba(0,0,0,0)"]  # pass, fail, not judged
    assert "1 device(s) without a die position" in note


def test_the_distribution_ends_at_one_with_the_spec_limit_drawn():
    from tonebench.report.comparison import SERIES_COLORS
    from tonebench.report.lot_plots import ecdf_figure

    rows = [row(f"S{i}", "L1", value) for i, value in enumerate((5.0, 3.0, 4.0, 6.0))]
    rows.append(row("S8", "L1", 1.0, flags=("slope",)))  # flagged: not in the distribution
    fig = ecdf_figure(rows, {"QMX-4410": [LimitRule(7, "iip3_dbm", 3.5, None, 2.3e9, 2.6e9)]}, SERIES_COLORS)
    (trace,) = fig.data
    assert list(trace.x) == [3.0, 4.0, 5.0, 6.0] and list(trace.y) == [0.25, 0.5, 0.75, 1.0]
    assert [shape.x0 for shape in fig.layout.shapes] == [3.5]
