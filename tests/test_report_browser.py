"""The morning report opened in a real headless browser (Debian's Chromium).

The page is loaded from the file system as a person opens it, and driven
through the DevTools protocol over a pipe (``--remote-debugging-pipe``: NUL-
terminated JSON on file descriptors 3 and 4, no port, no extra package). Checked:
no console error or uncaught exception, no request other than ``file:`` or
``data:`` (nothing leaves the machine), every ``<img>`` decoded with a nonzero
natural size and every image link resolving to a file, the sections present,
and a full-page screenshot saved with the test output (``tests/output/`` and
pytest's tmp folder) for a person to look at.

Skipped, with the reason, only where no Chromium can be found (``.ci/run``
installs it where it can).
"""

import base64
import fcntl
import json
import os
import select
import shutil
import subprocess
import tempfile
import time
from pathlib import Path
from urllib.parse import unquote, urlparse

import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table

from pipeline.products.manifest import write_manifest_file
from pipeline.products.report import write_night_report_file

_FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
          "--disable-background-networking", "--disable-component-update", "--disable-sync",
          "--remote-debugging-pipe", "--window-size=1366,900", "--hide-scrollbars")

SCREENSHOT_DIR = Path(__file__).resolve().parent / "output"


def _chromium():
    for name in ("chromium", "chromium-browser", "google-chrome"):
        path = shutil.which(name)
        if path:
            return path
    return None


class _Browser:
    """A minimal DevTools-protocol client over Chromium's debugging pipe."""

    def __init__(self, executable, profile_dir):
        to_child_r, self._to_child_w = os.pipe()
        self._from_child_r, from_child_w = os.pipe()
        # Chromium reads commands on fd 3 and writes replies and events on fd 4
        def child_pipes():
            # move both ends above 9 first, so that neither dup2 overwrites the other
            high = [fcntl.fcntl(fd, fcntl.F_DUPFD, 10) for fd in (to_child_r, from_child_w)]
            os.dup2(high[0], 3)
            os.dup2(high[1], 4)

        self._stderr_path = Path(profile_dir) / "chromium-stderr.txt"
        self._stderr = open(self._stderr_path, "wb")   # a pipe could fill up and stall Chromium
        self._proc = subprocess.Popen(
            [executable, *_FLAGS, f"--user-data-dir={profile_dir}", "about:blank"],
            stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=self._stderr,
            close_fds=False, preexec_fn=child_pipes)
        os.close(to_child_r)
        os.close(from_child_w)
        self._buffer = b""
        self._next_id = 0
        self.events = []

    def _read_message(self, deadline):
        while b"\0" not in self._buffer:
            remaining = deadline - time.monotonic()
            if remaining <= 0 or not select.select([self._from_child_r], [], [], remaining)[0]:
                raise TimeoutError("no answer from Chromium over the debugging pipe")
            chunk = os.read(self._from_child_r, 1 << 16)
            if not chunk:
                raise RuntimeError("Chromium closed the debugging pipe: "
                                   + self._stderr_path.read_text(errors="replace")[-2000:])
            self._buffer += chunk
        raw, self._buffer = self._buffer.split(b"\0", 1)
        return json.loads(raw)

    def send(self, method, params=None, session=None, timeout=60.0):
        self._next_id += 1
        message = {"id": self._next_id, "method": method, "params": params or {}}
        if session:
            message["sessionId"] = session
        os.write(self._to_child_w, json.dumps(message).encode() + b"\0")
        deadline = time.monotonic() + timeout
        while True:
            reply = self._read_message(deadline)
            if reply.get("id") == self._next_id:
                if "error" in reply:
                    raise RuntimeError(f"{method}: {reply['error']}")
                return reply.get("result", {})
            self.events.append(reply)

    def wait_for(self, method, timeout=60.0):
        deadline = time.monotonic() + timeout
        for event in self.events:
            if event.get("method") == method:
                return event
        while True:
            event = self._read_message(deadline)
            self.events.append(event)
            if event.get("method") == method:
                return event

    def close(self):
        try:
            self.send("Browser.close", timeout=10)
        except Exception:  # noqa: BLE001 - closing anyway
            pass
        try:
            self._proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self._proc.kill()
        self._stderr.close()
        for fd in (self._to_child_w, self._from_child_r):
            try:
                os.close(fd)
            except OSError:
                pass


def _png(path, shape=(30, 40)):
    """A real (tiny) PNG written by matplotlib, so the browser has something to decode."""
    import matplotlib
    matplotlib.use("Agg")
    from matplotlib.figure import Figure

    fig = Figure(figsize=(shape[1] / 10, shape[0] / 10), dpi=40)
    fig.add_subplot().plot(np.arange(5), np.arange(5) ** 2)
    fig.savefig(path)


def _demo_output(tmp_path):
    """A small invented output folder with every kind of input the report reads."""
    out = tmp_path / "out"
    for sub in ("calibrations", "calibrated", "qa", "wavelength", "flux", "logs/extract_spectra",
                "spectra/sci_002", "spectra_fluxed/sci_002"):
        (out / sub).mkdir(parents=True, exist_ok=True)
    log = Table(rows=[
        ("bias_001", "raw/bias_001.fits", "bias", "", "BIAS", 0.0, "2026-03-14T23:50:00", 61113.993,
         1.0, "ok", ""),
        ("arc_001", "raw/arc_001.fits", "arc", "SETUPA", "ARC", 5.0, "2026-03-15T00:10:00",
         61114.007, 1.0, "ok", ""),
        ("std_001", "raw/std_001.fits", "standard", "SETUPA", "LTT-STAR", 60.0,
         "2026-03-15T00:20:00", 61114.0139, 1.12, "ok", ""),
        ("sci_002", "raw/sci_002.fits", "science", "SETUPA", "TFG-42", 900.0,
         "2026-03-15T01:00:00", 61114.0417, 1.31, "ok", ""),
        ("trunc_004", "raw/trunc_004.fits", "science", "SETUPA", "TFG-42", 900.0,
         "2026-03-15T02:00:00", 61114.0833, 1.5, "rejected", "truncated file"),
    ], names=("frame_id", "path", "frame_type", "setup", "object", "exptime_s", "date_obs", "mjd",
              "airmass", "status", "reason"))
    log["readout"] = ["1x1"] * len(log)
    log.write(out / "night_log.ecsv", format="ascii.ecsv")
    bias = Table({"frame": ["bias_001"], "overscan_level_adu": [1001.2]})
    bias.meta.update(n_frames=1, read_noise_e_configured_gain=4.12, read_noise_configured_e=4.0,
                     read_noise_within_tolerance=True)
    bias.write(out / "calibrations" / "master_bias_1x1_qa.ecsv", format="ascii.ecsv")
    wave = Table({"line": [1, 2], "residual_angstrom": [0.01, -0.02]})
    wave.meta.update(setup="SETUPA", n_used=31, n_rejected=2, rms_angstrom=0.0158123, rms_px=0.0412)
    wave.write(out / "wavelength" / "arc_001_qa.ecsv", format="ascii.ecsv")
    sens = Table({"wavelength_angstrom": [5000.0, 6000.0], "ratio": [1.0, 1.01]})
    sens.meta.update(setup="SETUPA", status="ok", rms_percent=1.234567)
    sens.write(out / "flux" / "sensitivity_SETUPA_qa.ecsv", format="ascii.ecsv")
    flex = Table({"line": [5577.34], "shift_px": [0.3]})
    flex.meta.update(status="no_lines", n_used=0)
    flex.write(out / "qa" / "sci_002_flexure.ecsv", format="ascii.ecsv")
    traces = Table({"aperture": [1], "fwhm_px": [4.1], "trace_px": [30.2]})
    traces.write(out / "qa" / "sci_002_traces.ecsv", format="ascii.ecsv")
    for name in ("arc_001_wavelength_residuals.png", "sci_002_spectra.png",
                 "sensitivity_SETUPA.png"):
        _png(out / "qa" / name)
    header = fits.Header({"OBJECT": "TFG-42", "SETUP": "SETUPA", "INPUT01": "sci_002.fits"})
    fits.PrimaryHDU(np.zeros((2, 2), np.float32), header=header).writeto(
        out / "calibrated" / "sci_002.fits")
    # a job log as pipeline.workflow.dispatch writes it (logging + captured warnings)
    (out / "logs" / "extract_spectra" / "sci_002.log").write_text(
        "2026-03-15 09:01:02,345 INFO pipeline.extract_spectra: started\n"
        "2026-03-15 09:01:03,456 WARNING py.warnings: /x/pipeline/extraction/trace.py:120: "
        "TracingWarning: sci_002: no object above the detection threshold; no spectrum "
        "written\n  warnings.warn(\n")
    fits.PrimaryHDU(np.zeros((2, 2))).writeto(out / "wavelength" / "arc_001_solution.fits")
    write_manifest_file(products=[str(out / "qa" / "sci_002_fluxed.png")],
                        night_log=str(out / "night_log.ecsv"), manifest=str(out / "manifest.ecsv"),
                        out_dir=str(out))
    write_night_report_file(manifest=str(out / "manifest.ecsv"),
                            night_log=str(out / "night_log.ecsv"),
                            report=str(out / "night_report.html"), out_dir=str(out),
                            title="RLS test night",
                            limits={"wavelength_max_rms_px": 0.3, "sensitivity_max_rms_percent": 5.0},
                            spatial_scale_arcsec_per_px=0.2)
    return out


def _open_report(path, screenshot):
    executable = _chromium()
    if executable is None:
        pytest.skip("no Chromium on this machine (apt-get install -y chromium; .ci/run does this "
                    "where it can)")
    with tempfile.TemporaryDirectory(prefix="report-browser-") as profile:
        browser = _Browser(executable, profile)
        try:
            target = browser.send("Target.createTarget", {"url": "about:blank"})["targetId"]
            session = browser.send("Target.attachToTarget",
                                   {"targetId": target, "flatten": True})["sessionId"]
            for domain in ("Page", "Runtime", "Log", "Network"):
                browser.send(f"{domain}.enable", session=session)
            browser.send("Emulation.setDeviceMetricsOverride",
                         {"width": 1366, "height": 900, "deviceScaleFactor": 1, "mobile": False},
                         session=session)
            browser.send("Page.navigate", {"url": path.resolve().as_uri()}, session=session)
            browser.wait_for("Page.loadEventFired")
            state = browser.send("Runtime.evaluate", {"returnByValue": True, "expression": """
                ({images: Array.from(document.images).map(i => ({src: i.getAttribute('src'),
                    complete: i.complete, width: i.naturalWidth, height: i.naturalHeight})),
                  links: Array.from(document.querySelectorAll('a[href]')).map(
                    a => a.getAttribute('href')),
                  sections: Array.from(document.querySelectorAll('h2')).map(h => h.textContent),
                  ids: Array.from(document.querySelectorAll('section[id]')).map(s => s.id),
                  details: document.querySelectorAll('details').length,
                  scrollWidth: document.documentElement.scrollWidth,
                  text: document.body.innerText})"""}, session=session)["result"]["value"]
            shot = browser.send("Page.captureScreenshot",
                                {"format": "png", "captureBeyondViewport": True}, session=session)
            screenshot.write_bytes(base64.b64decode(shot["data"]))
        finally:
            browser.close()
    return state, browser.events


@pytest.fixture(scope="module")
def opened(tmp_path_factory):
    out = _demo_output(tmp_path_factory.mktemp("report"))
    shot = out / "night_report_screenshot.png"
    state, events = _open_report(out / "night_report.html", shot)
    SCREENSHOT_DIR.mkdir(exist_ok=True)
    shutil.copy(shot, SCREENSHOT_DIR / "night_report_test_page.png")
    return out, state, events, shot


def test_no_console_errors_and_nothing_leaves_the_machine(opened):
    _, _, events, _ = opened
    errors = [e["params"] for e in events if e.get("method") == "Runtime.exceptionThrown"]
    errors += [e["params"]["entry"] for e in events if e.get("method") == "Log.entryAdded"
               and e["params"]["entry"]["level"] == "error"]
    errors += [e["params"] for e in events if e.get("method") == "Runtime.consoleAPICalled"
               and e["params"]["type"] in ("error", "assert")]
    assert errors == []
    urls = [e["params"]["request"]["url"] for e in events
            if e.get("method") == "Network.requestWillBeSent"]
    assert urls, "the browser reported no request at all: the check would see nothing"
    assert [u for u in urls if urlparse(u).scheme not in ("file", "data")] == []


def test_every_image_renders_and_every_link_resolves(opened):
    out, state, _, _ = opened
    assert len(state["images"]) >= 3
    for image in state["images"]:
        assert image["complete"] and image["width"] > 0 and image["height"] > 0, image
    for href in state["links"]:
        parsed = urlparse(href)
        assert parsed.scheme in ("", "file"), href       # no link leaves the machine
        if parsed.path and not href.startswith("#"):
            assert (out / unquote(parsed.path)).exists(), href


def test_sections_a_tired_observer_needs(opened):
    _, state, _, _ = opened
    text = state["text"]
    for heading in ("Calibrations by setup", "Problems", "Night plot", "QA figures",
                    "Full tables"):
        assert any(heading in s for s in state["sections"]), (heading, state["sections"])
    assert "truncated file" in text                        # a rejected frame and its reason
    assert "no object above the detection threshold" in text   # a warning from a job log
    assert "flexure not measured" in text                  # from the flexure QA table
    assert "0.0158" in text and "0.0158123" not in text    # rms to the digits that matter
    assert "read_noise_e_configured_gain" not in text      # labels in words
    assert "read noise" in text
    assert state["details"] >= 1                           # full tables one click away
    assert state["scrollWidth"] <= 1366                    # fits a laptop screen


def test_screenshot_is_saved(opened):
    _, _, _, shot = opened
    data = shot.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 10_000
