"""The practice report opened in a real browser: headless Chromium (Debian's ``chromium``).

What a browser adds to ``tests/test_report.py`` (which reads the HTML as text): the page is laid
out and drawn (piano-roll rows, tempo curve and findings table have a size on screen and show
up in a screenshot), the embedded take decodes as audio of the right length, and opening the
page makes no network request. Chromium is driven with command-line switches only (``--dump-dom``,
``--screenshot``, ``--log-net-log``), so no Python dependency is needed; the tests skip where
``chromium`` is not on PATH (``.ci/run`` installs it).

The report is made once per test run from a committed deviation fixture through
:func:`takescribe.jobs.pipeline.compare_file`; under pytest-xdist the workers share it through a lock
file in the run's common temporary folder. Each Chromium run gets its own profile folder.
Screenshots are kept in the pytest temporary folder and copied to ``/tmp/report-screenshot.png``
(and ``/tmp/report-screenshot-grey.png``, the page through a greyscale filter) for a person to look at.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from conftest import FIXTURES

CHROMIUM = shutil.which("chromium")
pytestmark = pytest.mark.skipif(
    CHROMIUM is None, reason="chromium is not on PATH (Debian: apt-get install chromium); the browser tests need it")

TAKE = FIXTURES / "deviations" / "dev_violin_minuet_notes.flac"
PART = FIXTURES / "deviations" / "dev_violin_minuet.musicxml"
WINDOW = (1280, 2000)
SCREENSHOT_COPY = Path("/tmp/report-screenshot.png")
GREY_SCREENSHOT_COPY = Path("/tmp/report-screenshot-grey.png")

# Quiet, self-contained headless runs. The browser's own background services (time, update and
# account checks) may still try the network; the host-resolver map and the dead proxy keep every
# such attempt on this machine, and the net-log check below tells them from the page's requests.
_FLAGS = [
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
    "--disable-default-apps", "--disable-extensions", "--hide-scrollbars", "--mute-audio",
    "--host-resolver-rules=MAP * ~NOTFOUND", "--proxy-server=127.0.0.1:9",
]

# Appended to a copy of the page (never to the report itself): after load, and once the audio
# element has read its metadata, it writes what the browser laid out into a <pre> that
# --dump-dom then returns.
_PROBE = """
<script>
(function () {
  function box(el) { var r = el.getBoundingClientRect(); return {x: r.x, y: r.y, width: r.width, height: r.height}; }
  function shapes(svg) {
    return Array.prototype.map.call(svg.querySelectorAll('path, rect'), function (s) {
      var c = getComputedStyle(s);
      return {fill: c.fill, stroke: c.stroke, strokeWidth: parseFloat(c.strokeWidth)};
    });
  }
  function report(audio) {
    var out = {
      innerWidth: window.innerWidth,
      scrollWidth: document.documentElement.scrollWidth,
      rolls: Array.prototype.map.call(document.querySelectorAll('svg[aria-label^="Piano roll"]'), box),
      tempo: Array.prototype.map.call(document.querySelectorAll('svg[aria-label="Tempo bar by bar"]'), box),
      table: Array.prototype.map.call(document.querySelectorAll('table'), box),
      legend: Array.prototype.map.call(document.querySelectorAll('.legend > span'), function (s) {
        return {text: s.textContent.trim(), shapes: shapes(s.querySelector('svg'))};
      }),
      patterns: Array.prototype.map.call(document.querySelectorAll('pattern'), function (p) { return p.id; }),
      audio: audio
    };
    var pre = document.createElement('pre');
    pre.id = 'browser-probe';
    pre.textContent = JSON.stringify(out);
    document.body.appendChild(pre);
  }
  window.addEventListener('load', function () {
    var a = document.querySelector('audio');
    if (!a) { report(null); return; }
    if (a.readyState >= 1) { report({duration: a.duration}); return; }
    a.addEventListener('loadedmetadata', function () { report({duration: a.duration}); });
    a.addEventListener('error', function () { report({error: a.error ? a.error.code : -1}); });
  });
})();
</script>
"""


# --------------------------------------------------------------------------- helpers


def _chromium(args: list[str], *, profile: Path, window: tuple[int, int] = WINDOW) -> subprocess.CompletedProcess:
    """One headless Chromium run with its own profile folder (safe beside other xdist workers)."""
    command = [CHROMIUM, *_FLAGS, f"--user-data-dir={profile}", f"--window-size={window[0]},{window[1]}", *args]
    done = subprocess.run(command, capture_output=True, timeout=90, check=False)
    assert done.returncode == 0, f"chromium failed ({done.returncode}): {done.stderr.decode(errors='replace')[-2000:]}"
    return done


def _with(html_text: str, addition: str) -> str:
    """The page with ``addition`` inserted just before ``</body>``."""
    at = html_text.rindex("</body>")
    return html_text[:at] + addition + html_text[at:]


def _page_requests(net_log: Path) -> list[str]:
    """URLs of every request the net log shows a page asking for.

    Chromium's net log (``--log-net-log``) records each request of its network stack as a
    ``URL_REQUEST_START_JOB`` event whose ``initiator`` is the origin of the asking document;
    the browser's own background fetches carry ``"not an origin"``. Reading ``file:`` and
    ``data:`` URLs does not go through the network stack, so any URL listed here left the page.
    """
    log = json.loads(net_log.read_text(encoding="utf-8"))
    start_job = log["constants"]["logEventTypes"]["URL_REQUEST_START_JOB"]
    urls = []
    for event in log["events"]:
        params = event.get("params") or {}
        if event["type"] == start_job and "url" in params and params.get("initiator") != "not an origin":
            urls.append(params["url"])
    return urls


class _Elements(HTMLParser):
    """Tags, attributes and text of a dumped DOM, enough for the checks here."""

    def __init__(self):
        super().__init__()
        self.elements: list[tuple[str, dict]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.elements.append((tag, dict(attrs)))

    handle_startendtag = handle_starttag

    def handle_data(self, data):
        self.text.append(data)


def _parse(html_text: str) -> _Elements:
    parser = _Elements()
    parser.feed(html_text)
    parser.close()
    return parser


def _relative_luminance(rgb: tuple[float, float, float]) -> float:
    # WCAG 2.1, definition of "relative luminance" (sRGB components in 0..1)
    linear = [c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4 for c in rgb]
    return 0.2126 * linear[0] + 0.7152 * linear[1] + 0.0722 * linear[2]


def _contrast_with_white(rgb: tuple[float, float, float]) -> float:
    # WCAG 2.1, definition of "contrast ratio": (L1 + 0.05) / (L2 + 0.05), white has L = 1
    return 1.05 / (_relative_luminance(rgb) + 0.05)


def _css_rgb(value: str) -> tuple[float, float, float] | None:
    """``rgb(r, g, b)`` as computed by the browser, in 0..1; None for ``none`` or patterns."""
    match = re.fullmatch(r"rgba?\((\d+),\s*(\d+),\s*(\d+)(?:,\s*([\d.]+))?\)", value.strip())
    if match is None or (match.group(4) is not None and float(match.group(4)) == 0.0):
        return None
    return tuple(int(match.group(k)) / 255.0 for k in (1, 2, 3))


def _hex_rgb(colour: str) -> np.ndarray:
    return np.array([int(colour[k:k + 2], 16) for k in (1, 3, 5)], dtype=float)


# --------------------------------------------------------------------------- fixtures


@pytest.fixture(scope="session")
def browser_report(tmp_path_factory) -> dict:
    """The report of the violin minuet take with deviations, made once per run (shared by xdist workers)."""
    from takescribe.jobs.pipeline import compare_file

    worker = os.environ.get("PYTEST_XDIST_WORKER")
    # the workers of one run share the parent of their own temporary folders
    root = tmp_path_factory.getbasetemp().parent if worker else tmp_path_factory.getbasetemp()
    folder = root / "browser-report"
    try:
        import fcntl
    except ImportError:  # no POSIX locks: each worker makes its own copy
        fcntl = None
        folder = tmp_path_factory.mktemp("browser-report")
    with open(root / "browser-report.lock", "w") as lock:
        if fcntl is not None:
            fcntl.flock(lock, fcntl.LOCK_EX)
        if not (folder / "report.html").exists():
            # report.html is written last, so its absence means no finished report: redo it whole
            compare_file(TAKE, PART, folder, force=True)
    return {"folder": folder, "html": folder / "report.html",
            "findings": json.loads((folder / "findings.json").read_text(encoding="utf-8"))["findings"]}


@pytest.fixture(scope="module")
def probed(browser_report, tmp_path_factory) -> dict:
    """What Chromium laid out for the page at 1280 px wide (see ``_PROBE``)."""
    work = tmp_path_factory.mktemp("browser-probe")
    page = work / "probed.html"
    page.write_text(_with(browser_report["html"].read_text(encoding="utf-8"), _PROBE), encoding="utf-8")
    # virtual time lets the audio element read its metadata before the DOM is dumped
    done = _chromium(["--virtual-time-budget=10000", "--dump-dom", page.as_uri()], profile=work / "profile")
    match = re.search(r'<pre id="browser-probe">(.*?)</pre>', done.stdout.decode("utf-8"), re.S)
    assert match is not None, "the probe script did not report: the page did not finish loading in Chromium"
    import html

    return json.loads(html.unescape(match.group(1)))


# --------------------------------------------------------------------------- tests


def test_rendered_dom_has_piano_roll_legend_and_findings_table(browser_report, tmp_path):
    done = _chromium(["--dump-dom", browser_report["html"].as_uri()], profile=tmp_path / "profile")
    dom = _parse(done.stdout.decode("utf-8"))
    tags = [tag for tag, _ in dom.elements]
    labels = [attrs.get("aria-label", "") for _, attrs in dom.elements]
    assert any(label.startswith("Piano roll from") for label in labels)
    assert "Tempo bar by bar" in labels
    # one table row per finding, one piano-roll marker (a <g> with a "#id ..." tooltip) per finding
    findings = browser_report["findings"]
    assert len(findings) > 0, "the deviation fixture should give findings"
    n_body_rows = tags[tags.index("tbody"):].count("tr")
    assert n_body_rows == len(findings)
    text = "".join(dom.text)
    for f in findings:
        assert re.search(rf"#{f['id']} ", text), f"finding #{f['id']} has no marker tooltip in the piano roll"
    assert "All findings" in text and "Bar by bar" in text
    assert tags.count("audio") == 1


def test_page_makes_no_network_request(browser_report, tmp_path):
    net_log = tmp_path / "net-log.json"
    _chromium([f"--log-net-log={net_log}", "--virtual-time-budget=5000", "--dump-dom", browser_report["html"].as_uri()],
              profile=tmp_path / "profile")
    assert _page_requests(net_log) == []
    # every address in the page is data: or a same-page #fragment (the hatch pattern)
    dom = _parse(browser_report["html"].read_text(encoding="utf-8"))
    addresses = [v for _, attrs in dom.elements for k, v in attrs.items() if k in ("src", "href", "xlink:href")]
    assert all(v.startswith(("data:", "#")) for v in addresses), [v[:60] for v in addresses]


def test_network_check_sees_a_page_that_does_fetch(tmp_path):
    # the check above must be able to fail: the same run on a page with outside images and styles
    # (reserved .invalid names, RFC 2606, so nothing can answer) lists every one of them
    page = tmp_path / "fetching.html"
    page.write_text(
        '<!DOCTYPE html><html><head><link rel="stylesheet" href="https://style.invalid/a.css"></head><body>'
        '<img src="http://image.invalid/b.png" alt=""><svg><image href="http://drawing.invalid/c.png" width="4" '
        'height="4"/></svg><audio preload="metadata" src="http://sound.invalid/d.flac"></audio></body></html>',
        encoding="utf-8")
    net_log = tmp_path / "net-log.json"
    _chromium([f"--log-net-log={net_log}", "--virtual-time-budget=5000", "--dump-dom", page.as_uri()],
              profile=tmp_path / "profile")
    hosts = {re.match(r"\w+://([^/]+)/", url).group(1) for url in _page_requests(net_log)}
    assert hosts == {"style.invalid", "image.invalid", "drawing.invalid", "sound.invalid"}


def test_layout_at_desktop_width(probed):
    assert probed["innerWidth"] == WINDOW[0]
    # nothing wider than the window: no sideways scrolling at 1280 px
    assert probed["scrollWidth"] <= probed["innerWidth"]
    assert len(probed["rolls"]) >= 1 and len(probed["tempo"]) == 1 and len(probed["table"]) == 1
    for drawn in probed["rolls"] + probed["tempo"] + probed["table"]:
        assert drawn["width"] > 0.5 * WINDOW[0] and drawn["height"] > 50, drawn
    # page order: piano-roll rows top to bottom, then the tempo curve, then the table
    tops = [r["y"] for r in probed["rolls"]]
    assert tops == sorted(tops)
    assert tops[-1] < probed["tempo"][0]["y"] < probed["table"][0]["y"]
    # ids are page-wide in HTML: one hatch pattern shared by all drawings
    assert probed["patterns"] == ["hatch"]


def test_embedded_take_decodes_to_its_length(probed):
    import soundfile as sf

    assert probed["audio"] is not None and "duration" in probed["audio"], probed["audio"]
    # libsndfile's reading of the FLAC header against Chromium's decoder of the data: URI
    assert probed["audio"]["duration"] == pytest.approx(sf.info(str(TAKE)).duration, abs=0.05)


def test_legend_markers_stand_out_from_the_page(probed):
    from takescribe.report.practice import KIND_STYLES

    legend = {item["text"]: item["shapes"] for item in probed["legend"]}
    for kind, style in KIND_STYLES.items():
        assert style.label in legend, f"legend lacks {style.label!r}"
        best = 0.0
        for shape in legend[style.label]:
            for key, width_ok in (("stroke", shape["strokeWidth"] > 0), ("fill", True)):
                rgb = _css_rgb(shape[key])
                if rgb is not None and width_ok:
                    best = max(best, _contrast_with_white(rgb))
        # WCAG 2.1 success criterion 1.4.11 (non-text contrast): graphical objects need 3:1
        # against their background; a light fill passes through its dark outline
        assert best >= 3.0, f"{kind}: marker contrast {best:.2f} against the white page"


def test_screenshot_shows_the_drawings_and_finding_colours(browser_report, probed, tmp_path):
    from matplotlib.image import imread

    shot = tmp_path / "report.png"
    _chromium([f"--screenshot={shot}", browser_report["html"].as_uri()], profile=tmp_path / "profile")
    grey_page = tmp_path / "grey.html"
    grey_page.write_text(_with(browser_report["html"].read_text(encoding="utf-8"),
                               "<style>html{filter:grayscale(1)}</style>"), encoding="utf-8")
    grey_shot = tmp_path / "report-grey.png"
    _chromium([f"--screenshot={grey_shot}", grey_page.as_uri()], profile=tmp_path / "profile-grey")
    for made, copy in ((shot, SCREENSHOT_COPY), (grey_shot, GREY_SCREENSHOT_COPY)):
        try:  # for a person to look at; another worker or user may hold the name
            shutil.copyfile(made, copy)
        except OSError:
            pass

    pixels = imread(str(shot))[..., :3] * 255.0
    assert pixels.shape[:2] == (WINDOW[1], WINDOW[0])
    inside = np.zeros(pixels.shape[:2], dtype=bool)
    for r in probed["rolls"]:
        top, left = int(r["y"]), int(r["x"])
        inside[top:top + int(r["height"]), left:left + int(r["width"])] = True
    assert inside.any()
    roll = pixels[inside]

    def found(colour: str) -> bool:
        # a few pixels of exactly this colour (anti-aliased edges aside) inside the piano-roll rows
        return int(np.sum(np.all(np.abs(roll - _hex_rgb(colour)) <= 8, axis=1))) >= 3

    from takescribe.report.practice import _PLAYED_FILL, KIND_STYLES

    assert found(_PLAYED_FILL), "no played note drawn in the piano roll"
    kinds = {f["kind"] for f in browser_report["findings"]}
    coloured = [k for k in kinds if KIND_STYLES[k].colour.upper() != "#000000"]
    # black markers cannot be told from bar lines by colour; the DOM test counts them instead
    assert coloured, "the fixture should give at least one finding drawn in colour"
    for kind in coloured:
        assert found(KIND_STYLES[kind].colour), f"no {kind} marker colour in the piano roll"

    grey = imread(str(grey_shot))[..., :3]
    assert grey.shape[:2] == (WINDOW[1], WINDOW[0])
    # the greyscale page is grey: its channels agree
    assert float(np.max(np.ptp(grey, axis=-1))) <= 2.0 / 255.0
