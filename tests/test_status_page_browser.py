"""The status page in a real browser: headless Chromium (Debian's `chromium`) loads `/`.

Chromium is driven through its command line only, no extra Python packages:
`--dump-dom` prints the DOM after the page's scripts ran (within `--virtual-time-budget`),
and `--screenshot` saves a PNG. The DOM is parsed with the standard library's HTMLParser.
The page is fed by real channels running simulated sensors (invented data of our own).
"""

from __future__ import annotations

import os
import shutil
import struct
import subprocess
from collections.abc import Iterator
from dataclasses import dataclass, field
from html.parser import HTMLParser
from pathlib import Path

import pytest

from conftest import require_executable
from support.fake_status import ChannelsSource, FakeSource, demo_gateway, make_status
from zeroline.http_status import StatusServer, start_http_server

pytestmark = pytest.mark.service

CAUTION = (
    "Corrected values are advisory — not for safety alarms, interlocks or compliance reporting"
)
VOID = {"meta", "link", "input", "br", "img", "hr", "source", "wbr", "area", "col", "embed"}
#: Where to keep the screenshots after the run (e.g. for CI artefacts); tmp_path otherwise.
SCREENSHOT_DIR_ENV = "ZEROLINE_SCREENSHOT_DIR"


@dataclass
class Node:
    tag: str
    attrs: dict[str, str]
    children: list[Node] = field(default_factory=list)
    text_parts: list[str] = field(default_factory=list)

    def text(self) -> str:
        return "".join(self.text_parts) + "".join(c.text() for c in self.children)

    def find_all(self, tag: str | None = None, **attrs: str) -> Iterator[Node]:
        for child in self.children:
            if (tag is None or child.tag == tag) and all(
                child.attrs.get(k.replace("_", "-")) == v for k, v in attrs.items()
            ):
                yield child
            yield from child.find_all(tag, **attrs)

    def has(self, name: str) -> bool:
        return name in self.attrs


class _TreeBuilder(HTMLParser):
    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.root = Node("#root", {})
        self._stack = [self.root]

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        node = Node(tag, {k: v or "" for k, v in attrs})
        self._stack[-1].children.append(node)
        if tag not in VOID:
            self._stack.append(node)

    def handle_endtag(self, tag: str) -> None:
        for depth in range(len(self._stack) - 1, 0, -1):
            if self._stack[depth].tag == tag:
                del self._stack[depth:]
                return

    def handle_data(self, data: str) -> None:
        if self._stack[-1].tag not in ("script", "style"):
            self._stack[-1].text_parts.append(data)


def parse_dom(html: str) -> Node:
    builder = _TreeBuilder()
    builder.feed(html)
    return builder.root


class Chromium:
    """Runs headless Chromium with a fresh profile for every call."""

    FLAGS = (
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--no-first-run",
        "--hide-scrollbars",
        "--virtual-time-budget=5000",
    )

    def __init__(self, program: str, workdir: Path) -> None:
        self.program = program
        self.workdir = workdir
        self._runs = 0

    def _run(self, *args: str) -> str:
        self._runs += 1
        profile = self.workdir / f"profile-{self._runs}"
        completed = subprocess.run(
            [self.program, *self.FLAGS, f"--user-data-dir={profile}", *args],
            capture_output=True,
            text=True,
            timeout=60,
            check=False,
        )
        assert completed.returncode == 0, completed.stderr[-2000:]
        return completed.stdout

    def dom(self, url: str) -> Node:
        return parse_dom(self._run("--dump-dom", url))

    def screenshot(self, url: str, path: Path, width: int, height: int) -> Path:
        self._run(f"--screenshot={path}", f"--window-size={width},{height}", url)
        return path


def png_size(path: Path) -> tuple[int, int]:
    """Width and height from the PNG's IHDR chunk (PNG specification, section 11.2.2)."""
    data = path.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n", "not a PNG"
    assert data[12:16] == b"IHDR"
    width, height = struct.unpack(">II", data[16:24])
    return int(width), int(height)


@pytest.fixture(scope="module")
def chromium(tmp_path_factory: pytest.TempPathFactory) -> Chromium:
    program = require_executable("chromium", "chromium")
    return Chromium(program, tmp_path_factory.mktemp("chromium"))


@pytest.fixture(scope="module")
def gateway() -> Iterator[tuple[ChannelsSource, StatusServer]]:
    source = demo_gateway()
    handle = start_http_server(source, "127.0.0.1:0")
    yield source, handle
    handle.stop()


def cards(dom: Node) -> dict[str, Node]:
    return {card.attrs["data-channel"]: card for card in dom.find_all("article")}


def test_every_channel_is_drawn_with_its_alert_state(
    chromium: Chromium, gateway: tuple[ChannelsSource, StatusServer]
) -> None:
    """Each channel gets a card with a rendered chart (all 120 recent samples), its quality
    in words, drift against its limit and its active alerts (rule, severity, message)."""
    source, server = gateway
    dom = chromium.dom(server.url + "/")
    assert dom.find_all("body").__next__().attrs.get("data-loaded") == "true"
    page_text = dom.text()
    assert CAUTION in " ".join(page_text.split())
    found = cards(dom)
    assert list(found) == list(source.channel_names())
    words = {"ok": "ok", "learning": "learning", "extrapolating": "extrapolating"}
    for name, card in found.items():
        status = source.channel_status(name)
        assert status is not None
        charts = list(card.find_all("svg", data_rendered="true"))
        assert len(charts) == 1, name
        assert charts[0].attrs["data-points"] == "120"
        drawn = [p.attrs["d"] for p in charts[0].find_all("path") if p.attrs.get("d")]
        assert len(drawn) >= 3, (name, "raw, baseline and corrected lines expected")
        badge = next(card.find_all("span", **{"class": f"badge q-{status.quality}"}))
        assert words[status.quality] in badge.text()
        assert card.attrs["data-quality"] == status.quality
        text = " ".join(card.text().split())
        assert "Drift" in text and f"±{status.drift_limit:g}" in text
        rules = [li.attrs["data-rule"] for li in card.find_all("li")]
        assert rules == [a["rule"] for a in status.active_alerts]
        for alert in status.active_alerts:
            assert alert["message"] in text and alert["severity"] in text
        if not status.active_alerts:
            assert "No active alerts" in text
    assert found["silo-ref-cell"].attrs["data-alerts"] == "drift_limit"
    assert "alerting" in found["silo-ref-cell"].attrs["class"]
    summary = next(dom.find_all("p", id="summary")).text()
    assert summary.startswith("3 channels · 1 active alert ·"), summary


def test_screenshots_at_desktop_and_phone_width(
    chromium: Chromium, gateway: tuple[ChannelsSource, StatusServer], tmp_path: Path
) -> None:
    """The page renders at 1280 px and at 360 px (a small phone); both PNGs are kept."""
    _, server = gateway
    keep = Path(os.environ.get(SCREENSHOT_DIR_ENV, tmp_path))
    keep.mkdir(parents=True, exist_ok=True)
    for label, width, height in (("desktop", 1280, 900), ("phone", 360, 1800)):
        shot = chromium.screenshot(server.url + "/", tmp_path / f"{label}.png", width, height)
        assert png_size(shot) == (width, height)
        assert shot.stat().st_size > 20_000, "an almost empty page compresses to a few kB"
        if keep != tmp_path:
            shutil.copy(shot, keep / f"status_page_{label}.png")


def test_names_and_messages_are_shown_as_text_not_markup(
    chromium: Chromium, tmp_path: Path
) -> None:
    """A channel name or alert message holding HTML is displayed literally, never run."""
    hostile = '<img src=x onerror="document.title=1">'
    alert = {
        "time": 1.0,
        "channel": hostile,
        "rule": "drift_limit",
        "state": "raised",
        "value": 9.0,
        "limit": 5.0,
        "severity": "critical",
        "message": "<b>bold</b> " + hostile,
    }
    source = FakeSource(statuses={hostile: make_status(hostile, active_alerts=(alert,))})
    handle = start_http_server(source, "127.0.0.1:0")
    try:
        dom = chromium.dom(handle.url + "/")
    finally:
        handle.stop()
    main = next(dom.find_all("main"))
    assert not list(main.find_all("img")) and not list(main.find_all("b"))
    card = next(main.find_all("article"))
    assert next(card.find_all("h2")).text() == hostile
    assert "<b>bold</b>" in card.text()
    assert next(dom.find_all("title")).text() == "zeroline · gateway status"


def test_a_channel_without_a_kept_history_says_so_instead_of_waiting(
    chromium: Chromium,
) -> None:
    """Past the board's cap a channel has no chart: its card says that, not "waiting"."""
    source = FakeSource(
        statuses={
            "charted": make_status("charted"),
            "uncharted": make_status("uncharted", recent=(), recent_kept=False),
            "new": make_status("new", recent=()),
        }
    )
    handle = start_http_server(source, "127.0.0.1:0")
    try:
        dom = chromium.dom(handle.url + "/")
    finally:
        handle.stop()
    labels = {
        name: next(card.find_all("svg")).attrs["aria-label"] for name, card in cards(dom).items()
    }
    assert labels["uncharted"] == "uncharted: no chart kept"
    assert "no chart kept" in " ".join(cards(dom)["uncharted"].text().split())
    assert labels["new"] == "new: no readings yet"
    assert "no chart" not in labels["charted"]


def test_a_token_protected_gateway_asks_for_the_token(chromium: Chromium, tmp_path: Path) -> None:
    """Opened without a token, the page shows the token field and says why, and no data."""
    token_file = tmp_path / "token"
    token_file.write_text("page-token\n")
    source = FakeSource(statuses={"cell-a": make_status("cell-a")})
    handle = start_http_server(source, "127.0.0.1:0", token_file)
    try:
        dom = chromium.dom(handle.url + "/")
    finally:
        handle.stop()
    form = next(dom.find_all("form", id="token-form"))
    assert not form.has("hidden")
    assert "a token is needed" in next(dom.find_all("p", id="summary")).text()
    assert not list(dom.find_all("article"))
