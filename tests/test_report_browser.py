"""The HTML report in a real headless Chromium, driven over the DevTools protocol.

The browser talks to us over ``--remote-debugging-pipe`` (commands on its fd 3, replies on
its fd 4, each a JSON message ending in a NUL byte), so no port is opened at all. Two pages:

- the report of a real ``rescore demo`` run on the bundled data: it loads with no console
  error and no network request, the headline numbers shown equal those in report.json, the
  utterance filter works, the caution and the weights' checksum are on the page, and
  a full-page screenshot is saved (it is the README's picture);
- a report holding a hostile id and transcript: they appear as text and run nothing.
"""

from __future__ import annotations

import base64
import contextlib
import fcntl
import hashlib
import io
import json
import os
import random
import re
import select
import shutil
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from rescore.report import Pair, build_report, write_report
from rescore.report.build import CAUTION
from rescore.text import tokens
from tests.conftest import run

pytestmark = pytest.mark.browser

ROOT = Path(__file__).resolve().parent.parent
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--hide-scrollbars", "--remote-debugging-pipe"]
TIMEOUT = 30.0
# the browser reads commands from fd 3 and writes replies to fd 4
_LAUNCHER = ("import os, sys; r, w = int(sys.argv[1]), int(sys.argv[2]); os.dup2(r, 3); "
             "os.dup2(w, 4); os.close(r); os.close(w); os.execv(sys.argv[3], sys.argv[3:])")
HOSTILE_ID = 'row7<script>window.__pwned=1</script>"onload=window.__pwned=3'
# '<', '>' and '=' survive normalisation (symbols, not punctuation)
HOSTILE_TEXT = 'ph é <script>window.__pwned=2</script> "onload=window.__pwned=4 <img src=x>'
# ids 0001-0009 of the demo's test set: the utterance list in the README's picture
PICTURE_FILTER = "lark-test-000"
DOCS_PICTURE_LIMIT = 400_000  # bytes; the README's picture must stay quick to load


def _find_chromium() -> str | None:
    for name in ("chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    return None


@pytest.fixture(scope="session")
def chromium() -> str:
    # The suite never installs system packages itself; .ci/run installs Chromium in CI.
    path = _find_chromium()
    if path is None:
        pytest.skip("headless Chromium is not installed, so the HTML report was not checked "
                    "in a browser; install Debian's package with 'apt-get install chromium'")
    return path


class DevTools:
    """A minimal DevTools-protocol client over the browser's debugging pipe."""

    def __init__(self, executable: str, profile: Path) -> None:
        cmd_r, self._cmd_w = os.pipe()
        self._resp_r, resp_w = os.pipe()
        # move the browser's two ends above fd 9 so that placing them on 3 and 4 in the
        # child (a tiny Python launcher) can never overwrite one with the other
        high_r, high_w = (fcntl.fcntl(fd, fcntl.F_DUPFD, 10) for fd in (cmd_r, resp_w))
        os.close(cmd_r)
        os.close(resp_w)
        cmd_r, resp_w = high_r, high_w
        self.proc = subprocess.Popen(
            [sys.executable, "-c", _LAUNCHER, str(cmd_r), str(resp_w), executable, *FLAGS,
             f"--user-data-dir={profile}", "about:blank"],
            pass_fds=(cmd_r, resp_w), stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL)
        os.close(cmd_r)
        os.close(resp_w)
        self._buf = b""
        self._next = 0
        self.events: list[dict[str, Any]] = []

    def _read_message(self, deadline: float) -> dict[str, Any]:
        while b"\0" not in self._buf:
            left = deadline - time.monotonic()
            if left <= 0:
                raise TimeoutError("no reply from the browser")
            ready, _, _ = select.select([self._resp_r], [], [], left)
            if ready:
                chunk = os.read(self._resp_r, 1 << 20)
                if not chunk:
                    raise ConnectionError("the browser closed its debugging pipe")
                self._buf += chunk
        raw, self._buf = self._buf.split(b"\0", 1)
        message: dict[str, Any] = json.loads(raw)
        return message

    def send(self, method: str, params: dict[str, Any] | None = None,
             session: str | None = None) -> dict[str, Any]:
        self._next += 1
        msg: dict[str, Any] = {"id": self._next, "method": method, "params": params or {}}
        if session:
            msg["sessionId"] = session
        os.write(self._cmd_w, json.dumps(msg).encode() + b"\0")
        deadline = time.monotonic() + TIMEOUT
        while True:
            reply = self._read_message(deadline)
            if reply.get("id") == self._next:
                if "error" in reply:
                    raise RuntimeError(f"{method}: {reply['error']}")
                result: dict[str, Any] = reply.get("result", {})
                return result
            self.events.append(reply)

    def wait_for(self, method: str, seconds: float = TIMEOUT) -> dict[str, Any]:
        deadline = time.monotonic() + seconds
        for event in self.events:
            if event.get("method") == method:
                return event
        while True:
            event = self._read_message(deadline)
            self.events.append(event)
            if event.get("method") == method:
                return event

    def drain(self, seconds: float) -> None:
        """Collect events for a little while (late console messages, requests)."""
        deadline = time.monotonic() + seconds
        try:
            while True:
                self.events.append(self._read_message(deadline))
        except TimeoutError:
            pass

    def close(self) -> None:
        with contextlib.suppress(OSError, RuntimeError, TimeoutError, ConnectionError):
            self.send("Browser.close")
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(timeout=10)
        os.close(self._cmd_w)
        os.close(self._resp_r)


@pytest.fixture
def browser(chromium: str, tmp_path: Path) -> Iterator[DevTools]:
    client = DevTools(chromium, tmp_path / "profile")
    try:
        yield client
    finally:
        client.close()


def logbook_systems() -> tuple[list[Pair], list[Pair]]:
    """A small Larkspur Growhouse logbook with a recognizer before and after rescoring."""
    rng = random.Random(7)
    lines = ["vent bay three opened to forty percent", "lamp bank four dimmed at nine",
             "pump two primed and running", "ec reading one point eight in row six",
             "ph six point two on the basil trays", "shift note lettuce in bay five wilting",
             "close vent bay one at eighteen hundred", "check the drip line on row nine"]
    confusions = {"four": "for", "two": "to", "bay": "day", "vent": "went", "row": "grow",
                  "six": "sex", "point": "pint", "eight": "hate", "lamp": "lump"}
    before, after = [], []
    for i in range(40):
        ref = lines[i % len(lines)]
        words = ref.split()
        b = [confusions.get(w, w) if rng.random() < 0.35 else w for w in words]
        a = [x if rng.random() < 0.5 else w for x, w in zip(b, words, strict=True)]
        if rng.random() < 0.15:
            a.append("uh")
        meta = {"speaker": f"crew-{i % 3 + 1}", "channel": "headset" if i % 2 else "handheld"}
        uid = f"lark-{i + 1:04d}"
        before.append(Pair.from_text(uid, ref, " ".join(b), meta))
        after.append(Pair.from_text(uid, ref, " ".join(a), meta))
    before.append(Pair.from_text(HOSTILE_ID, "ph é ok", HOSTILE_TEXT, {"speaker": "crew-1"}))
    after.append(Pair.from_text(HOSTILE_ID, "ph é ok", "ph é ok", {"speaker": "crew-1"}))
    return before, after


def _shown_number(text: str) -> list[float]:
    """Numbers as a reader sees them: '12.50%' is 0.125, '-1.20 points' and '[-2.00,
    +1.00] points' are -0.012 and -0.02, 0.01 (percentage points), '0.0312' is 0.0312."""
    out = []
    in_points = text.endswith(" points")
    for m in re.finditer(r"([+-]?\d+(?:\.\d+)?)(%?)", text):
        value = float(m.group(1))
        out.append(value / 100 if m.group(2) or in_points else value)
    return out


def _lookup(data: dict[str, Any], key: str) -> Any:
    node: Any = data
    for part in key.split("."):
        node = node[part]
    return node


class Page:
    """One tab of the browser with a report loaded, and what happened while it loaded."""

    def __init__(self, browser: DevTools, path: Path, width: int = 1200) -> None:
        self.browser = browser
        self.url = path.resolve().as_uri()
        target = browser.send("Target.createTarget", {"url": "about:blank"})["targetId"]
        self.session = browser.send("Target.attachToTarget",
                                    {"targetId": target, "flatten": True})["sessionId"]
        for domain in ("Runtime", "Log", "Network", "Page"):
            browser.send(f"{domain}.enable", session=self.session)
        self.resize(width, 1400)
        browser.send("Page.navigate", {"url": self.url}, session=self.session)
        browser.wait_for("Page.loadEventFired")
        browser.drain(1.0)

    def resize(self, width: int, height: int) -> None:
        self.browser.send("Emulation.setDeviceMetricsOverride",
                          {"width": width, "height": height, "deviceScaleFactor": 1,
                           "mobile": False}, session=self.session)

    def evaluate(self, expression: str) -> Any:
        res = self.browser.send("Runtime.evaluate", {"expression": expression,
                                                     "returnByValue": True},
                                session=self.session)
        assert "exceptionDetails" not in res, res
        return res["result"].get("value")

    def errors(self) -> list[dict[str, Any]]:
        """Console errors, uncaught exceptions and CSP violations."""
        return [e for e in self.browser.events if
                (e.get("method") == "Runtime.consoleAPICalled"
                 and e["params"]["type"] in ("error", "assert"))
                or e.get("method") == "Runtime.exceptionThrown"
                or (e.get("method") == "Log.entryAdded"
                    and e["params"]["entry"]["level"] == "error")]

    def foreign_requests(self) -> list[str]:
        """Requests other than the page itself and inline data: images."""
        requests = [e["params"]["request"]["url"] for e in self.browser.events
                    if e.get("method") == "Network.requestWillBeSent"]
        assert self.url in requests
        return [u for u in requests if u != self.url and not u.startswith("data:")]

    def show(self, choice: str, query: str = "") -> int:
        """Set the utterance filter; the number of utterances left visible."""
        shown: int = self.evaluate(
            "(() => { const s = document.getElementById('utt-show');"
            " const q = document.getElementById('utt-filter');"
            f" s.value = {json.dumps(choice)}; q.value = {json.dumps(query)};"
            " s.dispatchEvent(new Event('change')); q.dispatchEvent(new Event('input'));"
            " return document.querySelectorAll('li.utt:not([hidden])').length; })()")
        return shown

    def full_screenshot(self, width: int = 1200) -> bytes:
        """The whole page, top to bottom, as PNG."""
        height = int(self.evaluate("document.documentElement.scrollHeight"))
        self.resize(width, height)
        shot = base64.b64decode(self.browser.send(
            "Page.captureScreenshot", {"format": "png", "captureBeyondViewport": True},
            session=self.session)["data"])
        assert shot.startswith(b"\x89PNG")
        return shot


@pytest.fixture
def demo_out(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """`rescore demo --data fixtures/demo --out demo-out` from a checkout, as a user runs it
    (the data folder is linked in, so the report's provenance shows the same relative paths)."""
    work = tmp_path / "checkout"
    (work / "fixtures").mkdir(parents=True)
    (work / "fixtures" / "demo").symlink_to(ROOT / "fixtures" / "demo",
                                            target_is_directory=True)
    monkeypatch.chdir(work)
    result = run(["demo", "--data", "fixtures/demo", "--out", "demo-out"])
    assert result.exit_code == 0, result.stderr
    return work / "demo-out"


def test_demo_report_page_in_chromium(browser: DevTools, demo_out: Path,
                                      tmp_path: Path) -> None:
    data = json.loads((demo_out / "report" / "report.json").read_text())
    page = Page(browser, demo_out / "report" / "report.html")
    assert page.errors() == []
    assert page.foreign_requests() == []

    # the headline numbers on the page are those of report.json, to the shown precision
    cells = page.evaluate("Array.from(document.querySelectorAll('td[data-key]')).map("
                          "e => [e.dataset.key, e.dataset.value, e.textContent])")
    keys = {k for k, _, _ in cells}
    assert {"before.wer", "after.wer", "difference.absolute", "difference.relative",
            "difference.probability_of_improvement", "difference.matched_pairs_p",
            "difference.sign_test_p", "difference.wilcoxon_p"} <= keys
    for key, value, text in cells:
        expected = [_lookup(data, k) for k in key.split(",")]
        if len(expected) == 1 and isinstance(expected[0], list):
            expected = expected[0]
        assert json.loads(value) == (expected if len(expected) > 1 else expected[0])
        if text.startswith("<"):
            # a p-value below what four decimals show is printed as "< 0.0001"
            assert text == "< 0.0001" and len(expected) == 1 and 0 <= expected[0] < 1e-4
            continue
        if text.startswith(">"):
            # every one of the 10,000 resamples improved: "> 0.9999", the resolution they give
            assert text == "> 0.9999" and expected == [1.0]
            continue
        shown = _shown_number(text)
        assert len(shown) == len(expected), (key, text)
        for got, want in zip(shown, expected, strict=True):
            # two decimals of a percentage, or four of a probability
            assert abs(got - want) <= 0.00051, (key, text, want)
    # the summary the demo prints and the page agree (one run, two outputs)
    summary = json.loads((demo_out / "summary.json").read_text())
    assert (summary["wer_before"], summary["wer_after"]) == (data["before"]["wer"],
                                                            data["after"]["wer"])

    # the utterance filter keeps exactly the utterances of each kind in report.json
    changes = [u["after_errors"] - u["before_errors"] for u in data["utterances"]]
    for choice, count in (("improved", sum(c < 0 for c in changes)),
                          ("worsened", sum(c > 0 for c in changes)),
                          ("unchanged", sum(c == 0 for c in changes)),
                          ("all", len(changes))):
        assert page.show(choice) == count, choice

    # the confusions table sorts by a column on a click: by the count after, largest first,
    # then back; the rows are those of report.json's breakdown.confusions either way
    table = data["breakdown"]["confusions"]
    read_rows = ("Array.from(document.querySelectorAll('#confusions tbody tr')).map("
                 "tr => Array.from(tr.cells).map(td => td.textContent))")
    after_head = "document.querySelectorAll('#confusions th')[4]"
    page.evaluate(f"{after_head}.click()")
    shown = page.evaluate(read_rows)
    assert [int(r[4]) for r in shown] == sorted((c["after"] for c in table), reverse=True)
    assert page.evaluate(f"{after_head}.getAttribute('aria-sort')") == "descending"
    page.evaluate(f"{after_head}.click()")
    assert [int(r[4]) for r in page.evaluate(read_rows)] == sorted(c["after"] for c in table)
    assert sorted(tuple(r) for r in shown) == sorted(
        (c["kind"], c["reference"] or "\u2013", c["hypothesis"] or "\u2013", str(c["before"]),
         str(c["after"]), f"{c['change']:+d}") for c in table)

    # the page carries the caution once (beside the headline) and records the weights
    # that made the after system
    body = page.evaluate("document.body.textContent")
    assert " ".join(body.split()).count(CAUTION) == 1
    weights_sha = data["provenance"]["weights"]["sha256"]
    assert weights_sha == hashlib.sha256((demo_out / "weights.json").read_bytes()).hexdigest()
    assert f"sha256 {weights_sha}" in body

    # the README's picture: the whole page, the utterance list narrowed by id (the page's own
    # filter) so that the breakdowns, a few utterances and the footer all fit
    picked = [u["id"] for u in data["utterances"] if u["id"].startswith(PICTURE_FILTER)]
    assert page.show("all", PICTURE_FILTER) == len(picked) > 0
    assert page.evaluate("document.getElementById('utt-count').textContent") == (
        f"{len(picked)} of {len(changes)} shown")
    shot = page.full_screenshot()
    (tmp_path / "report.png").write_bytes(shot)
    docs = ROOT / "docs" / "report.png"
    # written when missing or asked for (RESCORE_UPDATE_DOCS=1), so test runs do not churn it
    if not docs.exists() or os.environ.get("RESCORE_UPDATE_DOCS"):
        figures = page.evaluate(
            "Array.from(document.querySelectorAll('figure')).map(f => {"
            " const r = f.getBoundingClientRect();"
            " return [r.left, r.top + scrollY, r.right, r.bottom + scrollY]; })")
        picture = compact_png(shot, figures)
        assert len(picture) < DOCS_PICTURE_LIMIT, len(picture)
        docs.parent.mkdir(exist_ok=True)
        docs.write_bytes(picture)


def compact_png(shot: bytes, figures: list[list[float]]) -> bytes:
    """The screenshot with a 256-colour palette, so the README's picture stays light.

    Half the palette is the page's most common exact colours (backgrounds, text, table
    lines, the plots' line colours), half a median-cut palette of the figures alone (the
    heat map's gradient); every pixel takes the nearest entry, undithered.
    """
    from PIL import Image

    image = Image.open(io.BytesIO(shot)).convert("RGB")
    common = sorted(image.getcolors(image.width * image.height) or [], reverse=True)[:128]
    strips = [image.crop(tuple(round(v) for v in box)) for box in figures]
    sheet = Image.new("RGB", (max(s.width for s in strips), sum(s.height for s in strips)))
    top = 0
    for strip in strips:
        sheet.paste(strip, (0, top))
        top += strip.height
    gradient = sheet.quantize(colors=256 - len(common), method=Image.Quantize.MEDIANCUT,
                              kmeans=4).getpalette() or []
    flat = [c for _, rgb in common for c in rgb] + gradient[:3 * (256 - len(common))]
    palette = Image.new("P", (1, 1))
    palette.putpalette(flat + [0] * (768 - len(flat)))
    out = io.BytesIO()
    image.quantize(palette=palette, dither=Image.Dither.NONE).save(out, "PNG", optimize=True)
    return out.getvalue()


def test_hostile_text_stays_text_in_chromium(browser: DevTools, tmp_path: Path) -> None:
    before, after = logbook_systems()
    out = tmp_path / "report"
    write_report(build_report(before, after, provenance={"scenario": "browser check"},
                              resamples=2000, seed=0), out)
    page = Page(browser, out / "report.html")
    assert page.errors() == []
    assert page.foreign_requests() == []
    # shown as text, nothing ran, no element was injected
    assert page.evaluate("typeof window.__pwned") == "undefined"
    body = page.evaluate("document.body.textContent")
    assert HOSTILE_ID in body
    # the transcript as normalised ('/', '.', '_' and '"' are punctuation and become spaces)
    for word in tokens(HOSTILE_TEXT):
        assert word in body
    assert "<script>window" in body and "<img" in body
    assert page.evaluate("document.scripts.length") == 1
    assert page.evaluate("document.querySelectorAll('img').length") == 0
    # the filter finds the hostile utterance by its id, as text
    assert page.show("all", "row7<script>") == 1


def test_right_to_left_transcripts_render_right_to_left_in_chromium(
        browser: DevTools, tmp_path: Path) -> None:
    # dir="auto" on a transcript cell (HTML Living Standard: the direction of the first
    # strong character, here a Hebrew letter of bidirectional class R) makes Chromium lay
    # the Hebrew utterance out right to left, and leaves the English one left to right
    rows = [("u-he", "המשאבה נסגרה בשעה שלוש", "המשאבה נפתחה בשעה שלוש"),
            ("u-en", "pump two closed", "pump to closed")]
    before = [Pair.from_text(i, r, h) for i, r, h in rows]
    after = [Pair.from_text(i, r, r) for i, r, _ in rows]
    out = tmp_path / "report"
    write_report(build_report(before, after, resamples=200, seed=0), out)
    page = Page(browser, out / "report.html")
    assert page.errors() == []
    directions = page.evaluate(
        "Array.from(document.querySelectorAll('li.utt')).map(li => [li.id,"
        " Array.from(li.querySelectorAll('table.words td:nth-child(2)'))"
        ".map(td => getComputedStyle(td).direction)])")
    assert directions == [["u0", ["rtl", "rtl", "rtl"]], ["u1", ["ltr", "ltr", "ltr"]]]
    # laid out right to left: the first word of the reference sits right of the second
    order = page.evaluate(
        "(() => { const td = document.querySelector('#u0 table.words td:nth-child(2)');"
        " const r = document.createRange(); const t = td.firstChild;"
        " r.setStart(t, 0); r.setEnd(t, 1); const first = r.getBoundingClientRect().left;"
        " r.setStart(t, t.length - 1); r.setEnd(t, t.length);"
        " return first > r.getBoundingClientRect().left; })()")
    assert order is True
