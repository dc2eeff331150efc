"""Renders the demo report in headless Chromium and checks that a reader would see it.

Usage: check_report.py CANDOR_BINARY REPO_DIR [--screenshot OUT.png] [--page REPORT.html]

Writes the report for demo-data/traffic.jsonl, opens it in Chromium through the DevTools
protocol, and checks: the page loads; it has the four charts, each an <svg> drawn at a real size
with content; the page fetched nothing but its own file; no console error or uncaught exception;
the full-page screenshot is a real picture (not blank) showing the calibrated series' blue.
With --screenshot, also saves a reduced screenshot for the README; with --page, checks that
page instead of writing the demo report.
"""

import argparse
import base64
import io
import json
import os
import subprocess
import sys
import tempfile
import time
import urllib.request

import numpy as np
import websocket
from PIL import Image

CHROMIUM = os.environ.get("CHROMIUM", "chromium")
# The flags this machine's Chromium needs: no sandbox as root, no GPU, and no background
# networking (the machine has no network beyond package registries).
FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--hide-scrollbars",
    "--remote-debugging-port=0",
    "--remote-allow-origins=*",
]
VIEW_WIDTH = 1100
VIEW_HEIGHT = 1400
EXPECTED_CHARTS = 4
STARTUP_SECS = 30
LOAD_SECS = 30
# Okabe-Ito blue, the calibrated series; pixels within this distance per channel count.
CALIBRATED_RGB = (0x00, 0x72, 0xB2)
COLOUR_TOLERANCE = 40
MIN_BLUE_PIXELS = 2000
MIN_INK_SHARE = 0.02
MIN_COLOURS = 50
README_WIDTH = 760
README_MAX_BYTES = 300_000


class Checks:
    def __init__(self):
        self.passed = 0
        self.failed = []

    def check(self, ok, what):
        if ok:
            self.passed += 1
            print(f"ok   {what}")
        else:
            self.failed.append(what)
            print(f"FAIL {what}")


class DevTools:
    """A minimal DevTools-protocol client: commands by id, events kept in order."""

    def __init__(self, url):
        self.ws = websocket.create_connection(url, timeout=LOAD_SECS, suppress_origin=True)
        self.next_id = 0
        self.events = []

    def call(self, method, **params):
        self.next_id += 1
        my_id = self.next_id
        self.ws.send(json.dumps({"id": my_id, "method": method, "params": params}))
        while True:
            msg = json.loads(self.ws.recv())
            if msg.get("id") == my_id:
                if "error" in msg:
                    raise RuntimeError(f"{method}: {msg['error']}")
                return msg.get("result", {})
            if "method" in msg:
                self.events.append(msg)

    def wait_for(self, method, timeout):
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if any(e["method"] == method for e in self.events):
                return True
            self.ws.settimeout(max(0.1, deadline - time.monotonic()))
            try:
                msg = json.loads(self.ws.recv())
            except websocket.WebSocketTimeoutException:
                break
            if "method" in msg:
                self.events.append(msg)
        return any(e["method"] == method for e in self.events)


def start_chromium(profile, log):
    proc = subprocess.Popen(
        [CHROMIUM, *FLAGS, f"--user-data-dir={profile}",
         f"--window-size={VIEW_WIDTH},{VIEW_HEIGHT}", "about:blank"],
        stdout=log, stderr=log, stdin=subprocess.DEVNULL,
    )
    port_file = os.path.join(profile, "DevToolsActivePort")
    deadline = time.monotonic() + STARTUP_SECS
    while time.monotonic() < deadline:
        if os.path.exists(port_file):
            with open(port_file) as f:
                first = f.readline().strip()
            if first.isdigit():
                return proc, int(first)
        if proc.poll() is not None:
            break
        time.sleep(0.1)
    proc.kill()
    raise RuntimeError("Chromium did not open its DevTools port")


def page_socket(port):
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/json/list", timeout=10) as r:
        targets = json.load(r)
    pages = [t for t in targets if t.get("type") == "page"]
    if not pages:
        raise RuntimeError(f"no page target among {targets}")
    return pages[0]["webSocketDebuggerUrl"]


SVG_PROBE = """
JSON.stringify({
  title: document.title,
  sections: Array.from(document.querySelectorAll('section')).map(s => s.id),
  svgs: Array.from(document.querySelectorAll('svg')).map(s => {
    const r = s.getBoundingClientRect();
    return {width: r.width, height: r.height,
            elements: s.querySelectorAll('*').length,
            texts: s.querySelectorAll('text').length,
            marks: s.querySelectorAll('rect, polyline, path, circle, line').length};
  }),
  scripts: document.querySelectorAll('script').length,
  reliabilityBottom: document.querySelector('#reliability').getBoundingClientRect().bottom
})
"""


def run_checks(binary, repo, screenshot_out, page=None):
    checks = Checks()
    work = tempfile.mkdtemp(prefix="candor-report-")
    html = os.path.abspath(page) if page else os.path.join(work, "report.html")
    if not page:
        subprocess.run(
            [os.path.abspath(binary), "report", "--map", "demo-data/maps/letter-sorter.json",
             "--data", "demo-data/traffic.jsonl", "--out", html, "--bootstrap", "200",
             "--seed", "0"],
            check=True, cwd=repo,
        )
    log_path = os.path.join(work, "chromium.log")
    with open(log_path, "w") as log:
        proc, port = start_chromium(os.path.join(work, "profile"), log)
        try:
            tools = DevTools(page_socket(port))
            for domain in ("Page", "Runtime", "Log", "Network"):
                tools.call(f"{domain}.enable")
            tools.call("Emulation.setDeviceMetricsOverride", width=VIEW_WIDTH,
                       height=VIEW_HEIGHT, deviceScaleFactor=1, mobile=False)
            url = "file://" + html
            tools.call("Page.navigate", url=url)
            checks.check(tools.wait_for("Page.loadEventFired", LOAD_SECS), "page loaded")
            probe = json.loads(tools.call("Runtime.evaluate", expression=SVG_PROBE,
                                          returnByValue=True)["result"]["value"])
            metrics = tools.call("Page.getLayoutMetrics")
            size = metrics["cssContentSize"]
            shot = tools.call("Page.captureScreenshot", format="png", captureBeyondViewport=True,
                              clip={"x": 0, "y": 0, "width": size["width"],
                                    "height": size["height"], "scale": 1})
            png = base64.b64decode(shot["data"])
            try:
                tools.call("Browser.close")
            except Exception:  # the browser may close the socket before answering
                pass
        finally:
            try:
                proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()

    svgs = probe["svgs"]
    checks.check(probe["title"].startswith("Calibration report: letter-sorter"), "title names the map")
    checks.check(len(svgs) == EXPECTED_CHARTS, f"{EXPECTED_CHARTS} charts (found {len(svgs)})")
    drawn = [s for s in svgs if s["width"] >= 200 and s["height"] >= 150
             and s["texts"] >= 10 and s["marks"] >= 10]
    checks.check(len(drawn) == len(svgs) and svgs, f"every chart drawn with content: {svgs}")
    checks.check(probe["scripts"] == 0, "no scripts")
    for want in ("identity", "policy", "reliability", "histogram", "risk-coverage", "metrics",
                 "classes", "provenance", "signoff"):
        checks.check(want in probe["sections"], f"section {want}")

    errors = []
    for e in tools.events:
        p = e.get("params", {})
        if e["method"] == "Runtime.exceptionThrown":
            errors.append(p.get("exceptionDetails", {}).get("text", "exception"))
        elif e["method"] == "Runtime.consoleAPICalled" and p.get("type") in ("error", "assert"):
            errors.append(json.dumps(p.get("args", [])))
        elif e["method"] == "Log.entryAdded" and p.get("entry", {}).get("level") == "error":
            errors.append(p["entry"].get("text", "log error"))
    checks.check(not errors, f"no console errors {errors}")
    fetched = [e["params"]["request"]["url"] for e in tools.events
               if e["method"] == "Network.requestWillBeSent"]
    outside = [u for u in fetched if not (u == url or u.startswith("data:"))]
    checks.check(not outside, f"fetched nothing but the page itself {outside}")

    image = Image.open(io.BytesIO(png)).convert("RGB")
    width, height = image.size
    checks.check(width >= VIEW_WIDTH - 20 and height > VIEW_HEIGHT, f"full-page screenshot {image.size}")
    pixels = np.asarray(image, dtype=np.int32)
    ink = float((pixels.sum(axis=2) < 3 * 230).mean())
    checks.check(ink >= MIN_INK_SHARE, f"screenshot not blank ({ink:.1%} ink)")
    colours = len(np.unique(pixels.reshape(-1, 3), axis=0))
    checks.check(colours >= MIN_COLOURS, f"screenshot has {colours} colours")
    near = np.abs(pixels - np.array(CALIBRATED_RGB)).max(axis=2) <= COLOUR_TOLERANCE
    blue = int(near.sum())
    checks.check(blue >= MIN_BLUE_PIXELS, f"calibrated series visible ({blue} blue pixels)")

    if screenshot_out:
        save_readme_shot(image, round(probe["reliabilityBottom"]) + 16, screenshot_out)
        checks.check(os.path.getsize(screenshot_out) < README_MAX_BYTES,
                     f"README screenshot under {README_MAX_BYTES} bytes")
    if checks.failed:
        with open(log_path) as f:
            sys.stderr.write(f.read()[-4000:])
    print(f"browser: {checks.passed} passed, {len(checks.failed)} failed")
    return not checks.failed


def save_readme_shot(image, bottom, out):
    """The page from the top through the reliability diagrams, reduced."""
    top = image.crop((0, 0, image.width, min(image.height, bottom)))
    scale = README_WIDTH / top.width
    small = top.resize((README_WIDTH, round(top.height * scale)), Image.LANCZOS)
    small.save(out, optimize=True)


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("binary")
    parser.add_argument("repo")
    parser.add_argument("--screenshot")
    parser.add_argument("--page")
    args = parser.parse_args()
    sys.exit(0 if run_checks(args.binary, args.repo, args.screenshot, args.page) else 1)


if __name__ == "__main__":
    main()
