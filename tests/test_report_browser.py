"""The HTML report in a real headless browser (Debian's chromium).

The page is loaded from a file with every request sent through a proxy that
is a local listener on 127.0.0.1, loopback included (``<-loopback>``), so
anything the page fetched would arrive there.  Chromium 156 still makes a few
calls of its own to its vendor's service hosts whatever the flags (component
updates, account lookups); those are recognised by host and set aside, and
a canary page with one remote image proves that a page's request is caught.

Skipped when chromium is absent, except under CI (``CI=true``), where a
missing browser fails the test.
"""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import threading
from html.parser import HTMLParser
from pathlib import Path
from typing import Self

import pytest

from panelprep.clean import Policies
from panelprep.figures import missing_picture, picture_data
from panelprep.index import build_index
from panelprep.pipeline import load
from panelprep.prepare import PrepareOptions, prepare_frame
from panelprep.report.html import PREPARATION_SECTIONS, write_html

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
PICTURES = ("picture-presence", "picture-flow", "picture-obs", "picture-missing",
            "picture-share", "picture-theta")
# Hosts of the browser's own background services (not anything a page asked for).
BROWSER_SERVICE_SUFFIXES = (".google.com", ".googleapis.com", ".gstatic.com", ".gvt1.com")
FLAGS = (
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
    "--disable-extensions", "--disable-default-apps", "--no-pings", "--disable-breakpad",
    "--disable-domain-reliability", "--disable-client-side-phishing-detection",
    "--disable-features=NetworkTimeServiceQuerying,OptimizationHints,MediaRouter,Translate",
    "--metrics-recording-only", "--password-store=basic", "--hide-scrollbars",
)


def _chromium() -> str:
    found = shutil.which("chromium") or ("/usr/bin/chromium" if os.path.exists("/usr/bin/chromium")
                                         else None)
    if found:
        return found
    if os.environ.get("CI") == "true":
        pytest.fail("chromium is not installed but CI=true: .ci/run must install it "
                    "(apt-get install -y chromium)")
    pytest.skip("chromium is not installed (apt-get install chromium) and this is not CI")


class _Listener:
    """A TCP listener on 127.0.0.1 that records the first request line of each connection."""

    def __init__(self) -> None:
        self.server = socket.create_server(("127.0.0.1", 0))
        self.server.settimeout(0.1)
        self.port = self.server.getsockname()[1]
        self.requests: list[str] = []
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._serve, daemon=True)

    def _serve(self) -> None:
        while not self._stop.is_set():
            try:
                conn, _ = self.server.accept()
            except TimeoutError:
                continue
            with conn:
                conn.settimeout(2.0)
                data = b""
                try:
                    while b"\r\n" not in data and len(data) < 4096:
                        chunk = conn.recv(1024)
                        if not chunk:
                            break
                        data += chunk
                except OSError:
                    pass
                self.requests.append(data.split(b"\r\n", 1)[0].decode("latin-1"))

    def __enter__(self) -> Self:
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        self._thread.join(timeout=5)
        self.server.close()

    def page_requests(self) -> list[str]:
        """Requests other than the browser's own calls to its service hosts."""
        return [r for r in self.requests if not _host(r).endswith(BROWSER_SERVICE_SUFFIXES)]


def _host(request_line: str) -> str:
    """Host of a proxy request line: ``CONNECT h:443 ...`` or ``GET http://h/... ...``."""
    parts = request_line.split()
    if len(parts) < 2:
        return ""
    target = parts[1]
    if "://" in target:
        target = target.split("://", 1)[1]
    return "." + target.split("/", 1)[0].rsplit(":", 1)[0].lower()


def _run(chromium: str, tmp: Path, listener: _Listener, url: str, *extra: str) -> str:
    profile = tmp / f"profile-{len(list(tmp.glob('profile-*')))}"
    out = subprocess.run(
        [chromium, *FLAGS, f"--user-data-dir={profile}",
         f"--proxy-server=127.0.0.1:{listener.port}", "--proxy-bypass-list=<-loopback>",
         *extra, url],
        check=False, capture_output=True, text=True, timeout=90, stdin=subprocess.DEVNULL,
    )
    assert out.returncode == 0, out.stderr[-2000:]
    return out.stdout


class _Ids(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.ids: set[str] = set()
        self.svg_in: list[str] = []
        self._figure: str | None = None

    def handle_starttag(self, tag, attrs):
        values = dict(attrs)
        if "id" in values:
            self.ids.add(values["id"])
        if tag == "figure":
            self._figure = values.get("id")
        if tag == "svg" and self._figure:
            self.svg_in.append(self._figure)


@pytest.fixture(scope="module")
def page(tmp_path_factory) -> Path:
    """report.html of a preparation of the gaps fixture."""
    options = PrepareOptions(entity=["firm_id"], time="year", y="sales", x=["capital", "staff"],
                             policies=Policies())
    frame, info = load(FIXTURES / "gaps.csv", options.entity, options.time, options.variables)
    prep = prepare_frame(frame, options, info)
    summary = dict(prep.summary)
    summary["files"] = [{"name": "clean.parquet", "rows": len(prep.tables["clean"]),
                         "sha256": "0" * 64}]
    sample = build_index(prep.tables["clean"], options.entity, options.time,
                         summary["keys"]["freq"])
    pictures = picture_data(sample, theta=prep.components.theta_, variation=summary["variables"],
                            missing=missing_picture(prep.audit.context))
    return write_html(tmp_path_factory.mktemp("page") / "report.html", summary, pictures)


def test_browser_shows_every_section_and_picture_without_network(page, tmp_path):
    chromium = _chromium()
    with _Listener() as listener:
        dom = _run(chromium, tmp_path, listener, page.as_uri(), "--dump-dom")
        shot = tmp_path / "page.png"
        _run(chromium, tmp_path, listener, page.as_uri(), f"--screenshot={shot}",
             "--window-size=1280,2400")
    found = _Ids()
    found.feed(dom)
    for sid in (*PREPARATION_SECTIONS, *PICTURES):
        assert sid in found.ids, sid
    assert sorted(found.svg_in) == sorted(PICTURES), "each picture holds one inline SVG"
    assert listener.page_requests() == [], listener.page_requests()
    png = shot.read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    width, height = int.from_bytes(png[16:20], "big"), int.from_bytes(png[20:24], "big")
    assert (width, height) == (1280, 2400)
    from PIL import Image

    with Image.open(shot) as image:
        colours = image.convert("RGB").getcolors(maxcolors=1 << 20)
    assert colours is not None and len(colours) > 50, "the screenshot is nearly blank"
    destination = os.environ.get("PANELPREP_SCREENSHOT")
    if destination:
        shutil.copyfile(shot, destination)


def test_listener_catches_a_page_that_fetches_from_the_network(tmp_path):
    chromium = _chromium()
    canary = tmp_path / "canary.html"
    canary.write_text('<!DOCTYPE html><html><body><p id="here">canary</p>'
                      '<img src="http://panelprep-canary.test/pixel.png"></body></html>',
                      encoding="utf-8")
    with _Listener() as listener:
        dom = _run(chromium, tmp_path, listener, canary.as_uri(), "--dump-dom")
    assert 'id="here"' in dom
    assert any("panelprep-canary.test" in r for r in listener.page_requests()), listener.requests

