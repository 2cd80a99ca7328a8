"""The HTML report in a real headless Chromium, driven over the DevTools protocol.

The browser talks to us over ``--remote-debugging-pipe`` (commands on its fd 3, replies on
its fd 4, each a JSON message ending in a NUL byte), so no port is opened at all. Checks:
the page loads with no console error and no network request, the headline numbers shown
equal those in report.json, a hostile id and transcript appear as text and run nothing, the
utterance filter works, and a screenshot is saved.
"""

from __future__ import annotations

import base64
import contextlib
import fcntl
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
from rescore.text import tokens

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


def _find_chromium() -> str | None:
    for name in ("chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    return None


@pytest.fixture(scope="session")
def chromium() -> str:
    path = _find_chromium()
    if path is None and shutil.which("apt-get") and os.geteuid() == 0:
        # Debian's package; the package lists are refreshed once first
        env = {**os.environ, "DEBIAN_FRONTEND": "noninteractive"}
        subprocess.run(["apt-get", "update", "-qq"], env=env, capture_output=True, check=False,
                       timeout=600)
        subprocess.run(["apt-get", "install", "-y", "-qq", "chromium"], env=env,
                       capture_output=True, check=False, timeout=1200)
        path = _find_chromium()
    if path is None:
        pytest.skip("headless Chromium is not installed and could not be installed with "
                    "apt-get (Debian package 'chromium'); the browser check did not run")
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


TUNING = {
    "surface": {"lm_values": [0.0, 2.0, 4.0, 6.0, 8.0, 10.0],
                "penalty_values": [-4.0, -2.0, 0.0, 2.0, 4.0],
                "errors": [[61, 58, 57, 59, 63], [54, 50, 48, 51, 56], [49, 44, 41, 45, 52],
                           [50, 45, 43, 47, 53], [55, 49, 47, 50, 57], [60, 55, 53, 56, 62]]},
    "depth": [{"k": 1, "one_best_wer": 0.21, "tuned_wer": 0.21, "oracle_wer": 0.21},
              {"k": 2, "one_best_wer": 0.21, "tuned_wer": 0.17, "oracle_wer": 0.13},
              {"k": 5, "one_best_wer": 0.21, "tuned_wer": 0.14, "oracle_wer": 0.07},
              {"k": 10, "one_best_wer": 0.21, "tuned_wer": 0.135, "oracle_wer": 0.05}],
    "lm_weight": 4.0, "insertion_penalty": 0.0,
}


def _shown_number(text: str) -> list[float]:
    """Numbers as a reader sees them: '12.50%' is 0.125, '0.0312' is 0.0312."""
    out = []
    for m in re.finditer(r"([+-]?\d+(?:\.\d+)?)(%?)", text):
        value = float(m.group(1))
        out.append(value / 100 if m.group(2) else value)
    return out


def _lookup(data: dict[str, Any], key: str) -> Any:
    node: Any = data
    for part in key.split("."):
        node = node[part]
    return node


def test_report_page_in_chromium(browser: DevTools, tmp_path: Path) -> None:
    before, after = logbook_systems()
    report = build_report(before, after, provenance={"scenario": "browser check"},
                          tuning=TUNING, resamples=2000, seed=0)
    out = tmp_path / "report"
    write_report(report, out)
    data = json.loads((out / "report.json").read_text())
    page_url = (out / "report.html").resolve().as_uri()

    target = browser.send("Target.createTarget", {"url": "about:blank"})["targetId"]
    session = browser.send("Target.attachToTarget",
                           {"targetId": target, "flatten": True})["sessionId"]
    for domain in ("Runtime", "Log", "Network", "Page"):
        browser.send(f"{domain}.enable", session=session)
    browser.send("Emulation.setDeviceMetricsOverride",
                 {"width": 1200, "height": 1400, "deviceScaleFactor": 1, "mobile": False},
                 session=session)
    browser.send("Page.navigate", {"url": page_url}, session=session)
    browser.wait_for("Page.loadEventFired")
    browser.drain(1.0)

    def evaluate(expression: str) -> Any:
        res = browser.send("Runtime.evaluate", {"expression": expression,
                                                "returnByValue": True}, session=session)
        assert "exceptionDetails" not in res, res
        return res["result"].get("value")

    # no console errors, no uncaught exceptions, no CSP violations
    errors = [e for e in browser.events if
              (e.get("method") == "Runtime.consoleAPICalled"
               and e["params"]["type"] in ("error", "assert"))
              or e.get("method") == "Runtime.exceptionThrown"
              or (e.get("method") == "Log.entryAdded"
                  and e["params"]["entry"]["level"] == "error")]
    assert errors == []
    # no network request: only the page itself and the heat map's inline data: image
    requests = [e["params"]["request"]["url"] for e in browser.events
                if e.get("method") == "Network.requestWillBeSent"]
    assert page_url in requests
    assert [u for u in requests if u != page_url and not u.startswith("data:")] == []

    # the headline numbers on the page are those of report.json, to the shown precision
    cells = evaluate("Array.from(document.querySelectorAll('td[data-key]')).map("
                     "e => [e.dataset.key, e.dataset.value, e.textContent])")
    keys = {k for k, _, _ in cells}
    assert {"before.wer", "after.wer", "difference.absolute", "difference.relative",
            "difference.probability_of_improvement", "difference.mapsswe_p",
            "difference.sign_test_p", "difference.wilcoxon_p"} <= keys
    for key, value, text in cells:
        expected = [_lookup(data, k) for k in key.split(",")]
        if len(expected) == 1 and isinstance(expected[0], list):
            expected = expected[0]
        assert json.loads(value) == (expected if len(expected) > 1 else expected[0])
        shown = _shown_number(text)
        assert len(shown) == len(expected), (key, text)
        for got, want in zip(shown, expected, strict=True):
            # two decimals of a percentage, or four of a probability
            assert abs(got - want) <= 0.00051, (key, text, want)

    # hostile id and transcript: shown as text, nothing ran, no element was injected
    assert evaluate("typeof window.__pwned") == "undefined"
    body = evaluate("document.body.textContent")
    assert HOSTILE_ID in body
    # the transcript as normalised ('/', '.', '_' and '"' are punctuation and become spaces)
    for word in tokens(HOSTILE_TEXT):
        assert word in body
    assert "<script>window" in body and "<img" in body
    assert evaluate("document.scripts.length") == 1
    assert evaluate("document.querySelectorAll('img').length") == 0

    # the utterance filter: "worsened" keeps exactly the utterances that got worse
    worse = sum(u["after_errors"] > u["before_errors"] for u in data["utterances"])
    shown = evaluate("(() => { const s = document.getElementById('utt-show');"
                     " s.value = 'worsened'; s.dispatchEvent(new Event('change'));"
                     " return document.querySelectorAll('li.utt:not([hidden])').length; })()")
    assert shown == worse
    evaluate("(() => { const s = document.getElementById('utt-show'); s.value = 'all';"
             " s.dispatchEvent(new Event('change')); })()")

    shot = base64.b64decode(browser.send("Page.captureScreenshot", {"format": "png"},
                                         session=session)["data"])
    assert shot.startswith(b"\x89PNG")
    (tmp_path / "report.png").write_bytes(shot)
    docs = ROOT / "docs" / "report.png"
    # the README's picture: written when missing or asked for, so test runs do not churn it
    if not docs.exists() or os.environ.get("RESCORE_UPDATE_DOCS"):
        docs.parent.mkdir(exist_ok=True)
        docs.write_bytes(shot)
