"""report.html as a reader's browser shows it: headless Chromium driven over the DevTools protocol.

Regression of the report's page (no published values are involved). For the sample site and for a
hostile inventory (2,000 loops, long unbroken words, markup in every text column), checked:

- the page loads with no console message of level error, no uncaught exception and no network
  request (only the report file itself is read; host names resolve nowhere, so nothing could leave);
- no table is wider than the page and no cell's text runs out of its cell, on a desktop window and
  in print layout at the width of an A4 page's text block;
- Chromium's own print-to-PDF works and gives a readable PDF.

The protocol runs over ``--remote-debugging-pipe`` (requests on fd 3, replies on fd 4, one JSON
message per NUL byte: common practice, Chrome DevTools Protocol documentation), so no port is opened
and no extra package is needed. Screenshots are saved under pytest's temporary folder and listed in
the summary at the end of the run.
"""

from __future__ import annotations

import base64
import csv
import fcntl
import io
import json
import os
import select
import subprocess
import time
from pathlib import Path

import pytest
from pypdf import PdfReader

from audit.cli import main
from audit.generate import GENERATED_COLUMNS, synthetic_rows

from .conftest import keep_pictures, tool

FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--disable-extensions", "--disable-default-apps", "--mute-audio", "--hide-scrollbars",
         "--host-resolver-rules=MAP * ~NOTFOUND")
A4_TEXT_WIDTH_PX = round((210 - 2 * 13) / 25.4 * 96)
"""Width of the text block of an A4 page with the print style sheet's 13 mm side margins. [px]"""
DESKTOP = (1280, 900)
NARROW = (800, 900)
HOSTILE_LOOPS = 2000
LONG_WORD = "W" * 3000


def _above_4(fd: int) -> int:
    """``fd`` moved to a descriptor number of at least 5 (the old one closed)."""
    new = fcntl.fcntl(fd, fcntl.F_DUPFD, 5)
    os.close(fd)
    return new


class Chromium:
    """A headless Chromium and one page, spoken to over ``--remote-debugging-pipe``.

    Parameters
    ----------
    exe : str
        Browser executable.
    profile : Path
        An empty folder for the browser's profile.
    """

    def __init__(self, exe: str, profile: Path):
        to_browser_r, self._to_browser = os.pipe()
        self._from_browser, from_browser_w = os.pipe()
        # lift the child's ends above 4, so that placing one on fd 3 or 4 cannot overwrite the other
        to_browser_r, from_browser_w = (_above_4(fd) for fd in (to_browser_r, from_browser_w))
        self.log = profile / "chromium.log"
        self._log = self.log.open("wb")
        # in the child, the two ends go where Chromium expects them (fd 3 in, fd 4 out)
        self.proc = subprocess.Popen([exe, *FLAGS, f"--user-data-dir={profile}", "--remote-debugging-pipe"],
                                     pass_fds=(3, 4), preexec_fn=lambda: (os.dup2(to_browser_r, 3),
                                                                          os.dup2(from_browser_w, 4)),
                                     stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=self._log)
        os.close(to_browser_r)
        os.close(from_browser_w)
        self._buf = b""
        self._id = 0
        self.events: list[dict] = []
        target = self.call("Target.createTarget", {"url": "about:blank"})["targetId"]
        self.session = self.call("Target.attachToTarget", {"targetId": target, "flatten": True})["sessionId"]

    def _read(self, deadline: float) -> dict:
        while b"\0" not in self._buf:
            left = deadline - time.monotonic()
            if left <= 0 or not select.select([self._from_browser], [], [], left)[0]:
                raise TimeoutError("no reply from Chromium")
            chunk = os.read(self._from_browser, 1 << 20)
            if not chunk:
                raise ConnectionError(f"Chromium closed the pipe (its messages: {self.log})")
            self._buf += chunk
        msg, self._buf = self._buf.split(b"\0", 1)
        return json.loads(msg)

    def call(self, method: str, params: dict | None = None, page: bool = False, timeout: float = 600) -> dict:
        """Send one command (to the page when ``page``) and return its result; events are kept."""
        self._id += 1
        msg = {"id": self._id, "method": method, "params": params or {}}
        if page:
            msg["sessionId"] = self.session
        os.write(self._to_browser, json.dumps(msg).encode() + b"\0")
        deadline = time.monotonic() + timeout
        while True:
            reply = self._read(deadline)
            if reply.get("id") == self._id:
                if "error" in reply:
                    raise RuntimeError(f"{method}: {reply['error']}")
                return reply["result"]
            self.events.append(reply)

    def wait_for(self, event: str, timeout: float = 600) -> dict:
        """Wait for the page event ``event`` (one already received counts)."""
        deadline = time.monotonic() + timeout
        while True:
            for e in self.events:
                if e.get("method") == event:
                    return e
            self.events.append(self._read(deadline))

    def evaluate(self, script: str):
        """The value of a JavaScript expression on the page."""
        res = self.call("Runtime.evaluate", {"expression": script, "returnByValue": True}, page=True)
        if "exceptionDetails" in res:
            raise RuntimeError(res["exceptionDetails"])
        return res["result"]["value"]

    def close(self) -> None:
        try:
            self.call("Browser.close", timeout=10)
        except (TimeoutError, ConnectionError, RuntimeError, OSError):
            pass
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
        os.close(self._to_browser)
        os.close(self._from_browser)
        self._log.close()


# Tables wider than the page, cells whose text runs past their edge (beyond 1 px of rounding), and in the
# tables of narrow columns, words of up to 24 characters that a line break cuts in two ('medi' / 'um'); a break
# after a hyphen ('half-' / 'plane') is ordinary typesetting, so the parts of a hyphenated word count as words.
MEASURE = r"""(() => {
  const vw = document.documentElement.clientWidth;
  const wide = [], spill = [], cut = [];
  for (const t of document.querySelectorAll('table')) {
    const r = t.getBoundingClientRect();
    if (r.left < -1 || r.right > vw + 1) wide.push(`${t.className}: ${Math.round(r.left)}..${Math.round(r.right)} px`);
  }
  for (const c of document.querySelectorAll('td, th')) {
    if (c.scrollWidth > c.clientWidth + 1) {
      spill.push(`${c.closest('table').className} "${c.textContent.trim().slice(0, 40)}": ${c.scrollWidth} > ${c.clientWidth} px`);
    }
  }
  const range = document.createRange();
  const walker = document.createTreeWalker(document.body, NodeFilter.SHOW_TEXT, {acceptNode: n =>
    n.parentElement.closest('table.loops, table.work, table.tally-table') ? NodeFilter.FILTER_ACCEPT : NodeFilter.FILTER_REJECT});
  let words = 0;
  for (let n = walker.nextNode(); n; n = walker.nextNode()) {
    for (const m of n.data.matchAll(/(?<![^\s-])[^\s-]{2,24}(?![^\s-])/g)) {
      words++;
      range.setStart(n, m.index);
      range.setEnd(n, m.index + m[0].length);
      const tops = new Set(Array.from(range.getClientRects(), q => Math.round(q.top)));
      if (tops.size > 1) cut.push(m[0]);
    }
  }
  return {vw: vw, page: document.documentElement.scrollWidth, wide: wide, spill: spill.slice(0, 20),
          nspill: spill.length, tables: document.querySelectorAll('table').length,
          words: words, cut: cut.slice(0, 20), ncut: cut.length};
})()"""


def hostile_inventory(path: Path) -> Path:
    """A seeded 2,000-loop inventory whose text columns carry long words and markup.

    Every 50th row gets a 3,000-character word in ``area``; every 7th a service text of markup
    and a 300-character word; every 11th a tag with markup. Numbers are left as generated.
    """
    rows = synthetic_rows(HOSTILE_LOOPS, seed=19)
    for i, r in enumerate(rows):
        if i % 50 == 3:
            r["area"] = LONG_WORD
        if i % 7 == 1:
            r["service"] = "</table><img src=x onerror=alert(1)> <b>bold</b> " + "x" * 300
        if i % 11 == 5 and not r.get("inner_loop"):
            r["tag"] = f"<i>{r['tag']}</i>"
    with path.open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(GENERATED_COLUMNS)
        for r in rows:
            w.writerow(["" if r.get(c) is None else r.get(c) for c in GENERATED_COLUMNS])
    return path


@pytest.fixture(scope="module")
def browser(tmp_path_factory):
    exe = tool("chromium", "/usr/bin/chromium")
    b = Chromium(exe, tmp_path_factory.mktemp("chromium-profile"))
    yield b
    b.close()


@pytest.fixture(scope="module")
def hostile_report(tmp_path_factory) -> Path:
    """report.html of the hostile 2,000-loop inventory, made once per module (the HTML only: Chromium prints it)."""
    folder = tmp_path_factory.mktemp("hostile-report")
    inv = hostile_inventory(folder / "hostile.csv")
    # no proposals: they cost most of the run and add only short figures to the work list
    code = main(["run", str(inv), "--out", str(folder / "out"), "--date", "2024-05-01", "--quiet",
                 "--no-history", "--no-pdf", "--propose", "none"])
    assert code in (0, 1)
    return folder / "out"


@pytest.fixture(scope="module")
def shots(tmp_path_factory) -> Path:
    return keep_pictures(tmp_path_factory.mktemp("browser-screenshots"))


def open_report(b: Chromium, html: Path, size: tuple[int, int], media: str = "screen") -> dict:
    """Load ``html`` in a fresh document at window ``size`` [px]; the events seen while loading."""
    b.events.clear()
    for domain in ("Page", "Runtime", "Log", "Network"):
        b.call(f"{domain}.enable", page=True)
    b.call("Emulation.setDeviceMetricsOverride",
           {"width": size[0], "height": size[1], "deviceScaleFactor": 1, "mobile": False}, page=True)
    b.call("Emulation.setEmulatedMedia", {"media": media}, page=True)
    b.call("Page.navigate", {"url": html.resolve().as_uri()}, page=True)
    b.wait_for("Page.loadEventFired")
    b.evaluate("document.fonts.ready.then(() => true)")
    return {"events": list(b.events), "url": html.resolve().as_uri()}


def problems(seen: dict) -> list[str]:
    """Console errors, uncaught exceptions and requests for anything but the report itself."""
    out = []
    for e in seen["events"]:
        m, p = e.get("method"), e.get("params", {})
        if m == "Runtime.consoleAPICalled" and p.get("type") in ("error", "assert"):
            out.append(f"console {p['type']}: {p.get('args')}")
        elif m == "Runtime.exceptionThrown":
            out.append(f"exception: {p.get('exceptionDetails', {}).get('text')}")
        elif m == "Log.entryAdded" and p.get("entry", {}).get("level") == "error":
            out.append(f"log error: {p['entry'].get('text')} {p['entry'].get('url', '')}")
        elif m == "Network.requestWillBeSent" and p["request"]["url"] != seen["url"]:
            out.append(f"request: {p['request']['url'][:100]}")
    return out


def screenshot(b: Chromium, path: Path, selector: str | None = None) -> Path:
    """Save a PNG of the window, scrolled to ``selector``'s top when given (the top of the page if not)."""
    if selector:
        b.evaluate(f"document.querySelector({json.dumps(selector)}).scrollIntoView()")
    else:
        b.evaluate("window.scrollTo(0, 0)")
    shot = b.call("Page.captureScreenshot", {"format": "png"}, page=True)
    path.write_bytes(base64.b64decode(shot["data"]))
    return path


def check_page(b: Chromium, html: Path, shots: Path, name: str, whole_words: bool) -> None:
    """Load clean, fit at three widths; with ``whole_words``, no word cut at 1280 px or in print.

    The hostile page is checked for fit alone: its tags of 17 characters with markup are meant to be
    too long for their column and must break.
    """
    seen = open_report(b, html, DESKTOP)
    assert problems(seen) == []
    assert b.evaluate("document.querySelectorAll('script, iframe, object, embed, img').length") == 0
    for sel in ("body", "#work-list", "#all-loops"):
        screenshot(b, shots / f"{name}-{sel.strip('#')}.png", None if sel == "body" else sel)
    # a desktop window, a narrow one (fit only: ten columns in 800 px must share words), the printed text block
    for size, media, words_whole in ((DESKTOP, "screen", whole_words), (NARROW, "screen", False),
                                     ((A4_TEXT_WIDTH_PX, 1100), "print", whole_words)):
        if size != DESKTOP:
            open_report(b, html, size, media)
        m = b.evaluate(MEASURE)
        where = f"{name}, {media} at {size[0]} px (screenshots in {shots})"
        assert m["tables"] > 3 and m["words"] > 500
        assert m["wide"] == [], where
        assert m["page"] <= m["vw"], where
        assert m["nspill"] == 0, (where, m["spill"])
        if words_whole:
            assert m["ncut"] == 0, (where, m["cut"])
    screenshot(b, shots / f"{name}-print-all-loops.png", "#all-loops")


def print_pdf(b: Chromium, html: Path, path: Path) -> PdfReader:
    """Chromium's own print of the page (its print style sheet, the page size the CSS asks for)."""
    open_report(b, html, DESKTOP)
    res = b.call("Page.printToPDF", {"printBackground": True, "preferCSSPageSize": True,
                                     "transferMode": "ReturnAsBase64"}, page=True, timeout=600)
    data = base64.b64decode(res["data"])
    path.write_bytes(data)
    return PdfReader(io.BytesIO(data))


def test_sample_page_loads_clean_and_fits(browser, sample_report, shots):
    check_page(browser, sample_report / "report.html", shots, "sample", whole_words=True)


def test_sample_prints_from_the_browser(browser, sample_report, shots):
    pdf = print_pdf(browser, sample_report / "report.html", shots / "sample-chromium.pdf")
    text = "".join(p.extract_text() for p in pdf.pages)
    assert len(pdf.pages) > 10
    assert "Advisory only" in text and "All loops" in text
    assert abs(float(pdf.pages[0].mediabox.width) - 595.3) < 1      # A4 from the print style sheet [pt]


def test_hostile_page_loads_clean_and_fits(browser, hostile_report, shots):
    html = (hostile_report / "report.html").read_text(encoding="utf-8")
    assert "<b>bold</b>" not in html and "&lt;b&gt;bold&lt;/b&gt;" in html
    check_page(browser, hostile_report / "report.html", shots, "hostile", whole_words=False)


def test_hostile_prints_from_the_browser(browser, hostile_report, shots):
    pdf = print_pdf(browser, hostile_report / "report.html", shots / "hostile-chromium.pdf")
    assert len(pdf.pages) > 50
    assert "Advisory only" in pdf.pages[0].extract_text()
