"""The report of the demo's store, opened in headless Chromium.

The demo (``leadline demo``) writes a real store through the service, evidence included. Its report
is loaded in Chromium driven over the DevTools protocol on 127.0.0.1 (a websocket client reads the
console and evaluates JavaScript in the page), then drawn once more with ``--screenshot``. Skipped
only where no Chromium binary is installed.
"""

from __future__ import annotations

import io
import json
import shutil
import subprocess
import tempfile
import time
import urllib.request
from pathlib import Path

import pytest

from leadline.adapters.cli import main
from leadline.adapters.cli.demo import run_demo
from leadline.adapters.store import open_store

pytestmark = pytest.mark.slow

WIDTH, HEIGHT = 1280, 2000
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         f"--window-size={WIDTH},{HEIGHT}"]


def chromium() -> str | None:
    for name in ("chromium", "chromium-browser", "google-chrome", "chrome"):
        found = shutil.which(name)
        if found:
            return found
    return "/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None


@pytest.fixture(scope="module")
def demo_report(tmp_path_factory):
    folder = tmp_path_factory.mktemp("demo")
    result = run_demo(folder, out=io.StringIO(), live_seconds=3.0)
    html = folder / "report.html"
    # the two live days, 2026-10-19 and 2026-10-20, in the demo's zone (Europe/London)
    assert main(["report", "--config", str(folder / "leadline.toml"), "--since", "2026-10-19",
                 "--until", "2026-10-21", "--out", str(html)]) == 0
    return folder, html, result


def test_every_demo_event_has_its_readings_stored(demo_report):
    folder, _, result = demo_report
    with open_store(str(folder / "leadline.db")) as store:
        events = store.events()
        evidence = store.evidence([s.event.key for s in events])
    assert events and set(evidence) == {s.event.key for s in events}
    for s in events:
        record = evidence[s.event.key]
        onset = s.event.start.timestamp()
        assert record.epoch_s[0] < onset <= record.epoch_s[-1]
        if record.complete:
            assert record.epoch_s[-1] >= s.event.end.timestamp()
    assert any(r.complete for r in evidence.values())


class DevTools:
    """A minimal DevTools-protocol client over one page's websocket."""

    def __init__(self, url: str) -> None:
        import websocket

        self.ws = websocket.create_connection(url, timeout=30, suppress_origin=True)
        self.next_id = 0
        self.events: list[dict] = []

    def call(self, method: str, **params) -> dict:
        self.next_id += 1
        self.ws.send(json.dumps({"id": self.next_id, "method": method, "params": params}))
        while True:
            msg = json.loads(self.ws.recv())
            if msg.get("id") == self.next_id:
                if "error" in msg:
                    raise AssertionError(f"{method}: {msg['error']}")
                return msg.get("result", {})
            self.events.append(msg)

    def wait_for(self, method: str, timeout_s: float = 30.0) -> dict:
        deadline = time.monotonic() + timeout_s
        for msg in self.events:
            if msg.get("method") == method:
                return msg
        while time.monotonic() < deadline:
            msg = json.loads(self.ws.recv())
            self.events.append(msg)
            if msg.get("method") == method:
                return msg
        raise AssertionError(f"no {method} within {timeout_s} s")

    def evaluate(self, expression: str):
        result = self.call("Runtime.evaluate", expression=expression, returnByValue=True)
        if "exceptionDetails" in result:
            raise AssertionError(f"page script failed: {result['exceptionDetails']}")
        return result["result"]["value"]

    def close(self) -> None:
        self.ws.close()


def _start(binary: str, profile: str) -> tuple[subprocess.Popen, int]:
    proc = subprocess.Popen([binary, *FLAGS, f"--user-data-dir={profile}", "--remote-debugging-address=127.0.0.1",
                             "--remote-debugging-port=0", "about:blank"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    port_file = Path(profile) / "DevToolsActivePort"
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        if port_file.exists() and port_file.read_text().strip():
            return proc, int(port_file.read_text().split()[0])
        if proc.poll() is not None:
            raise AssertionError(f"chromium exited with {proc.returncode} before it listened")
        time.sleep(0.1)
    proc.kill()
    raise AssertionError("chromium did not open its DevTools port within 60 s")


def _stop(proc: subprocess.Popen) -> None:
    proc.terminate()
    try:
        proc.wait(timeout=15)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait(timeout=15)


PAGE_FACTS = """(() => {
  const panels = [...document.querySelectorAll('article.incident')];
  return {
    panels: panels.length,
    plots: panels.map(p => {
      const g = p.querySelector('svg, img');
      if (!g) return null;
      const r = g.getBoundingClientRect();
      return [r.width, r.height];
    }),
    noPlot: panels.filter(p => !p.querySelector('svg, img')).length,
    rate: (() => { const r = document.querySelector('#rate svg').getBoundingClientRect(); return [r.width, r.height]; })(),
    scrollWidth: document.body.scrollWidth,
    title: document.title,
  };
})()"""


def test_the_report_loads_in_chromium_without_errors_and_fits_the_width(demo_report, tmp_path):
    binary = chromium()
    if binary is None:
        pytest.skip("no Chromium binary installed (Debian: apt-get install chromium)")
    pytest.importorskip("websocket", reason="websocket-client is in the test extra")
    folder, html, result = demo_report
    profile = tempfile.mkdtemp(dir=tmp_path)
    proc, port = _start(binary, profile)
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/json/list", timeout=10) as response:
            targets = json.load(response)
        page = next(t for t in targets if t.get("type") == "page")
        tools = DevTools(page["webSocketDebuggerUrl"])
        try:
            for domain in ("Page", "Runtime", "Log", "Network"):
                tools.call(f"{domain}.enable")
            tools.events.clear()
            tools.call("Page.navigate", url=html.as_uri())
            tools.wait_for("Page.loadEventFired")
            facts = tools.evaluate(PAGE_FACTS)
            events = list(tools.events)
        finally:
            tools.close()
    finally:
        _stop(proc)

    errors = [e for e in events if e.get("method") == "Runtime.exceptionThrown"
              or (e.get("method") == "Runtime.consoleAPICalled" and e["params"]["type"] in ("error", "assert"))
              or (e.get("method") == "Log.entryAdded" and e["params"]["entry"]["level"] == "error")]
    assert errors == []
    fetched = [e["params"]["request"]["url"] for e in events if e.get("method") == "Network.requestWillBeSent"]
    assert all(u.startswith(("file:", "data:")) for u in fetched), fetched
    # one panel per incident of the demo's live days, each with a drawn plot
    with open_store(str(folder / "leadline.db")) as store:
        from leadline.adapters.report.figures import group_incidents

        events_live = store.events()
    assert facts["panels"] == len(group_incidents(events_live, max(s.event.start for s in events_live)))
    assert facts["panels"] >= 5 and facts["noPlot"] == 0  # at least one per planted fault of the demo
    assert all(w > 300 and h > 100 for w, h in facts["plots"]), facts["plots"]
    assert facts["rate"][0] > 300 and facts["rate"][1] > 80
    assert facts["scrollWidth"] <= WIDTH
    assert facts["title"] == "Alarm report"

    shot = tmp_path / "report.png"
    profile2 = tempfile.mkdtemp(dir=tmp_path)
    subprocess.run([binary, *FLAGS, f"--user-data-dir={profile2}", f"--screenshot={shot}", html.as_uri()],
                   stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, timeout=120, check=True)
    from PIL import Image

    with Image.open(shot) as image:
        assert image.size == (WIDTH, HEIGHT)
        grey = image.convert("L")
        histogram = grey.histogram()
    dark = sum(histogram[:128])  # text, plot lines, bars
    assert dark > 0.005 * WIDTH * HEIGHT, "the screenshot is (nearly) blank"
    assert histogram[255] > 0.3 * WIDTH * HEIGHT  # and mostly a white page, as designed
