"""HTML reports: self-contained (every resource a data: URI), pictures that decode to the
written results, and a real headless Chromium that renders the page with every image
loaded, the tables present and no failed request or script error.

The browser is driven through the Chrome DevTools Protocol over
``--remote-debugging-pipe`` (NUL-separated JSON messages on file descriptors 3
and 4, as the protocol's documentation describes), so no websocket client is
needed.  The test is skipped only when no Chromium is installed; CI installs it.
"""

from __future__ import annotations

import base64
import csv
import fcntl
import io as _io
import json
import os
import re
import shutil
import subprocess
import tempfile
import time
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from skimage.data import binary_blobs

from mrfclean.batch import BatchOptions, run_batch
from mrfclean.clean import Settings
from mrfclean.cli import main
from mrfclean.report import batch_report, sweep_report
from mrfclean.sweep import run_sweep

FAST = Settings(sweeps=30, burn_in=10, samples=20)


def _pairs(root, n=2, size=48):
    (root / "in").mkdir(parents=True)
    (root / "ref").mkdir()
    for i in range(n):
        clean = binary_blobs(size, blob_size_fraction=0.25, volume_fraction=0.4, rng=i)
        noisy = clean ^ (np.random.default_rng(i).random(clean.shape) < 0.1)
        Image.fromarray(noisy.astype(np.uint8) * 255).save(root / "in" / f"s{i}.png")
        Image.fromarray(clean.astype(np.uint8) * 255).save(root / "ref" / f"s{i}.png")


class _Collect(HTMLParser):
    def __init__(self):
        super().__init__()
        self.urls, self.imgs, self.tables, self.tags = [], [], 0, []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append(tag)
        for key in ("src", "href", "action", "data", "poster"):
            if key in a:
                self.urls.append(a[key])
        if tag == "img":
            self.imgs.append(a)
        if tag == "table":
            self.tables += 1


def _parse(path):
    p = _Collect()
    p.feed(Path(path).read_text(encoding="utf-8"))
    return p


def _decode(uri):
    assert uri.startswith("data:image/png;base64,")
    return np.array(Image.open(_io.BytesIO(base64.b64decode(uri.split(",", 1)[1]))))


@pytest.fixture(scope="module")
def batch_dir(tmp_path_factory):
    root = tmp_path_factory.mktemp("report")
    _pairs(root)
    (root / "in" / "broken.png").write_bytes(b"not a png")
    r = run_batch([root / "in"], root / "out", settings=FAST,
                  options=BatchOptions(workers=1, progress=False, reference=str(root / "ref"),
                                       report=True))
    assert (r.done, r.failed) == (2, 1)
    return root


def test_batch_report_is_self_contained_and_shows_the_results(batch_dir):
    page = batch_dir / "out" / "report.html"
    parsed = _parse(page)
    assert parsed.urls and all(u.startswith("data:") for u in parsed.urls)
    assert "link" not in parsed.tags and "script" not in parsed.tags
    text = page.read_text()
    assert not re.search(r"url\(\s*['\"]?(?!data:)", text)  # no CSS fetches either
    # per image: input, cleaned, P(on), std, energy trace
    assert len(parsed.imgs) == 2 * 5
    by_alt = {}
    for img in parsed.imgs:
        by_alt.setdefault(img["alt"].split(" (")[0], []).append(img["src"])
    assert len(by_alt["cleaned"]) == 2
    # the embedded 'cleaned' pictures are the written results, pixel for pixel
    written = [np.array(Image.open(batch_dir / "out" / f"s{i}.png")) for i in range(2)]
    shown = [_decode(u) for u in by_alt["cleaned"]]
    assert all(np.array_equal(a, b) for a, b in zip(written, shown))
    assert "broken.png" in text and "cannot read" in text  # the failure is listed
    assert parsed.tables >= 3


def test_chains_that_disagree_are_flagged(tmp_path):
    _pairs(tmp_path, n=1)
    # one sweep of burn-in and two samples from two chains: the test makes R-hat large
    # on purpose, then reads the verdict the report must show
    r = run_batch([tmp_path / "in"], tmp_path / "out", settings=Settings(burn_in=0, samples=2),
                  options=BatchOptions(workers=1, progress=False))
    entry = r.entries[0]
    page = batch_report(tmp_path / "out")
    text = page.read_text()
    if entry["diagnostics"]["chains_agree"] is False:
        assert "Chains disagree" in text and "Chains did not agree for: s0.png" in text
    else:
        assert "Chains disagree" not in text


def test_report_command_rebuilds_from_the_folder(batch_dir, capsys):
    target = batch_dir / "again.html"
    assert main(["report", str(batch_dir / "out"), "--output", str(target)]) == 0
    assert len(_parse(target).imgs) == 10
    assert main(["report", str(batch_dir / "ref")]) == 1  # no manifest there: one line
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "no batch recorded" in err[0]


def test_sweep_report_has_curves_and_best(tmp_path):
    _pairs(tmp_path)
    pairs = [(tmp_path / "in" / f"s{i}.png", tmp_path / "ref" / f"s{i}.png") for i in range(2)]
    table = run_sweep(pairs, grid={"coupling": [0.4, 0.8]}, base=FAST, workers=1)
    page = sweep_report(table, tmp_path / "sweep.html")
    parsed = _parse(page)
    assert all(u.startswith("data:") for u in parsed.urls)
    # one curve per metric against the single swept parameter
    assert len(parsed.imgs) == len(table.metrics) == 5
    assert "Best setting per metric" in page.read_text()


# ---------------------------------------------------------------------------
# a real browser
# ---------------------------------------------------------------------------
def _chromium():
    for name in ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable"):
        found = shutil.which(name)
        if found:
            return found
    return None


class _DevTools:
    """Minimal Chrome DevTools Protocol client over --remote-debugging-pipe."""

    def __init__(self, exe, profile):
        to_chrome_r, self._w = os.pipe()
        self._r, from_chrome_w = os.pipe()
        flags = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync",
                 "--disable-extensions", "--remote-debugging-pipe", f"--user-data-dir={profile}",
                 "about:blank"]

        def child_fds():  # chromium reads commands on fd 3 and writes replies on fd 4
            high_r = fcntl.fcntl(to_chrome_r, fcntl.F_DUPFD, 10)  # out of the way of 3 and 4
            high_w = fcntl.fcntl(from_chrome_w, fcntl.F_DUPFD, 10)
            os.dup2(high_r, 3)
            os.dup2(high_w, 4)

        # fds 3 and 4 are kept open through exec (closing the others happens after preexec_fn)
        self.proc = subprocess.Popen([exe, *flags], pass_fds=(3, 4, to_chrome_r, from_chrome_w),
                                     preexec_fn=child_fds, stdout=subprocess.DEVNULL,
                                     stderr=subprocess.DEVNULL)
        os.close(to_chrome_r)
        os.close(from_chrome_w)
        self._buf = b""
        self._id = 0
        self.events = []

    def _read_message(self, deadline):
        while b"\0" not in self._buf:
            if time.monotonic() > deadline:
                raise TimeoutError("no answer from chromium")
            import select

            ready, _, _ = select.select([self._r], [], [], 0.5)
            if ready:
                chunk = os.read(self._r, 1 << 16)
                if not chunk:
                    raise RuntimeError("chromium closed the pipe")
                self._buf += chunk
        raw, self._buf = self._buf.split(b"\0", 1)
        return json.loads(raw)

    def send(self, method, params=None, session=None, timeout=30):
        self._id += 1
        msg = {"id": self._id, "method": method, "params": params or {}}
        if session:
            msg["sessionId"] = session
        os.write(self._w, json.dumps(msg).encode() + b"\0")
        deadline = time.monotonic() + timeout
        while True:
            m = self._read_message(deadline)
            if m.get("id") == self._id:
                if "error" in m:
                    raise RuntimeError(f"{method}: {m['error']}")
                return m.get("result", {})
            self.events.append(m)

    def wait_event(self, name, timeout=30):
        deadline = time.monotonic() + timeout
        for m in self.events:
            if m.get("method") == name:
                return m
        while True:
            m = self._read_message(deadline)
            self.events.append(m)
            if m.get("method") == name:
                return m

    def close(self):
        try:
            self.send("Browser.close", timeout=5)
        except Exception:
            pass
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
        os.close(self._w)
        os.close(self._r)


_CHECK_PAGE = """JSON.stringify({
  images: Array.from(document.images).map(i => ({ok: i.complete && i.naturalWidth > 0,
                                                  w: i.naturalWidth, shown: i.getBoundingClientRect().width})),
  tables: document.querySelectorAll('table').length,
  rows: document.querySelectorAll('tr').length,
  warnings: document.querySelectorAll('.warn, .fail').length,
  title: document.title
})"""


def _render(exe, page):
    with tempfile.TemporaryDirectory() as profile:
        dt = _DevTools(exe, profile)
        try:
            target = dt.send("Target.createTarget", {"url": "about:blank"})["targetId"]
            session = dt.send("Target.attachToTarget", {"targetId": target, "flatten": True})["sessionId"]
            for domain in ("Page", "Network", "Runtime", "Log"):
                dt.send(f"{domain}.enable", session=session)
            dt.send("Page.navigate", {"url": Path(page).resolve().as_uri()}, session=session)
            dt.wait_event("Page.loadEventFired", timeout=60)
            result = dt.send("Runtime.evaluate", {"expression": _CHECK_PAGE, "returnByValue": True},
                             session=session)
            shot = dt.send("Page.captureScreenshot", {"format": "png"}, session=session)
            events = list(dt.events)
        finally:
            dt.close()
    state = json.loads(result["result"]["value"])
    failed = [e["params"] for e in events if e.get("method") == "Network.loadingFailed"]
    errors = [e["params"] for e in events
              if e.get("method") == "Runtime.exceptionThrown"
              or (e.get("method") == "Log.entryAdded" and e["params"]["entry"]["level"] == "error")]
    requests = [e["params"]["request"]["url"] for e in events
                if e.get("method") == "Network.requestWillBeSent"]
    screenshot = np.array(Image.open(_io.BytesIO(base64.b64decode(shot["data"]))))
    return state, failed, errors, requests, screenshot


@pytest.mark.slow
def test_report_renders_in_headless_chromium(batch_dir, tmp_path):
    exe = _chromium()
    if exe is None:
        if os.environ.get("CI"):
            pytest.fail("CI must have chromium (.ci/run installs it)")
        pytest.skip("chromium is not installed (CI installs it: apt-get install chromium)")
    # the sweep report too, on the same pairs
    pairs = [(batch_dir / "in" / f"s{i}.png", batch_dir / "ref" / f"s{i}.png") for i in range(2)]
    sweep_page = sweep_report(run_sweep(pairs, grid={"coupling": [0.4, 0.8]}, base=FAST, workers=1),
                              tmp_path / "sweep.html")
    for page, n_images in ((batch_dir / "out" / "report.html", 10), (sweep_page, 5)):
        state, failed, errors, requests, shot = _render(exe, page)
        assert len(state["images"]) == n_images
        assert all(i["ok"] and i["shown"] > 0 for i in state["images"]), state["images"]
        assert state["tables"] >= 2 and state["rows"] > 3
        assert failed == [] and errors == []
        # the only requests: the page itself and its own data: URIs
        assert all(u.startswith(("file://", "data:")) for u in requests), requests
        assert state["title"].startswith("mrfclean")
        assert shot.ndim == 3 and shot.std() > 0  # something was drawn


@pytest.mark.slow
def test_browser_check_catches_a_missing_image(tmp_path):
    exe = _chromium()
    if exe is None:
        if os.environ.get("CI"):
            pytest.fail("CI must have chromium (.ci/run installs it)")
        pytest.skip("chromium is not installed (CI installs it: apt-get install chromium)")
    # the checks above must be able to fail: a page with an image that cannot load
    page = tmp_path / "bad.html"
    page.write_text('<!DOCTYPE html><html><head><title>bad</title></head><body>'
                    f'<img src="{(tmp_path / "missing.png").as_uri()}"><table><tr><td>x</td></tr></table>'
                    '</body></html>')
    state, failed, errors, requests, shot = _render(exe, page)
    assert state["images"] == [{"ok": False, "w": 0, "shown": state["images"][0]["shown"]}]
    assert len(failed) == 1


def test_grey_card_shows_the_monte_carlo_error(tmp_path):
    """A greyscale result's card and the batch summary name the posterior mean's
    Monte-Carlo error (the ``mc_error`` its diagnostics carry, see
    ``estimates.Diagnostics``) and the shipped prior used."""
    from skimage.data import camera

    (tmp_path / "in").mkdir()
    x = camera()[200:248, 200:248].astype(np.float64)
    y = np.clip(x + 20 * np.random.default_rng(0).standard_normal(x.shape), 0, 255)
    Image.fromarray(y.astype(np.uint8)).save(tmp_path / "in" / "g.png")
    r = run_batch([tmp_path / "in"], tmp_path / "out", settings=Settings(),
                  options=BatchOptions(workers=1, progress=False))
    mc = r.entries[0]["diagnostics"]["mc_error"]
    family = r.entries[0]["params"]["prior_family"]
    assert 0 < mc < 1 and family in ("smooth", "textured", "blocks")
    with open(tmp_path / "out" / "summary.csv") as fh:  # the batch summary carries both too
        row = next(csv.DictReader(fh))
    assert float(row["mc_error"]) == pytest.approx(mc) and row["prior"] == family
    text = batch_report(tmp_path / "out").read_text()
    assert "Monte-Carlo error / posterior sd" in text
    assert ">prior</th>" in text and f">{family}</td>" in text
