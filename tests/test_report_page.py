"""The report page as a browser sees it, and the figures' marks.

The page's structure is checked with the standard library's HTML parser (``html.parser``);
where Debian's Chromium is installed (``/usr/bin/chromium``, package ``chromium``) the page
is also rendered headless and its DOM and a screenshot are checked. That test is skipped
cleanly where no browser is installed.
"""

from __future__ import annotations

import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import matplotlib
import numpy as np
import pytest
import xarray as xr

matplotlib.use("Agg")

from xtalkcal.cli import main  # noqa: E402
from xtalkcal.outputs import COLOURS, plot_gate_errors, plot_matrix_db  # noqa: E402

SECTIONS = ["Calibration", "Settings", "Verification", "Simultaneous randomized benchmarking",
            "Drift watch", "About this report", "Drive limits in force"]


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("page") / "demo"
    args = ["demo", "--out", str(out), "--aggressors", "q4-line", "--days", "0.3",
            "--rb-qubits", "q4,q5", "--rb-draws", "2", "-q"]
    assert main(args) == 0
    return out


class _Page(HTMLParser):
    """Tags in document order with their parents, and the text outside code."""

    def __init__(self) -> None:
        super().__init__()
        self.stack: list[str] = []
        self.tags: list[tuple[str, tuple[str, ...], dict]] = []
        self.text: dict[str, list[str]] = {}
        self.loose_text: list[str] = []
        self.pre: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, tuple(self.stack), dict(attrs)))
        if tag not in ("img", "meta", "br", "hr"):
            self.stack.append(tag)
            if tag == "pre":
                self.pre.append("")

    def handle_endtag(self, tag):
        if tag in self.stack:
            while self.stack.pop() != tag:
                pass

    def handle_data(self, data):
        if self.stack and self.stack[-1] in ("h1", "h2", "h3"):
            self.text.setdefault(self.stack[-1], []).append(data.strip())
        if "pre" in self.stack:
            self.pre[-1] += data
        elif "code" not in self.stack and "style" not in self.stack:
            self.loose_text.append(data)


def _parse(path: Path) -> _Page:
    page = _Page()
    page.feed(path.read_text(encoding="utf-8"))
    return page


def test_page_structure(demo):
    page = _parse(demo / "report.html")
    assert page.text["h1"] == ["Crosstalk calibration of grid9-demo"]
    # the sections in the order of the job, then provenance and limits
    assert page.text["h2"] == SECTIONS
    # every list item sits in a list
    items = [parents for tag, parents, _ in page.tags if tag == "li"]
    assert items and all(p and p[-1] in ("ul", "ol") for p in items)
    # the matrix table appears once, as a preformatted block, and so does the RB table
    matrix_head = (demo / "report.md").read_text().split("### Matrix")[1].split("\n")[3]
    assert sum(matrix_head.strip() in block for block in page.pre) == 1
    assert sum("error per gate (×10⁻⁴)" in block for block in page.pre) == 1
    # Markdown was rendered: no literal backticks or image syntax left in the prose
    prose = "".join(page.loose_text)
    assert "`" not in prose and "![" not in prose and "**" not in prose
    # every figure is embedded, none is a broken link
    imgs = [a for tag, _, a in page.tags if tag == "img"]
    assert len(imgs) >= 7 and all(a["src"].startswith("data:image/png;base64,") for a in imgs)
    assert all(a.get("alt") for a in imgs)


def test_page_names_where_it_comes_from(demo):
    md = (demo / "report.md").read_text()
    about = md.split("## About this report")[1]
    assert "- written: 20" in about and " UTC" in about
    assert "protocol file: `" in about and "chip file: `" in about
    assert "grid9_device.toml" in about or "derived" in about


_BROWSER = shutil.which("chromium") or shutil.which("chromium-browser")


@pytest.mark.skipif(_BROWSER is None, reason="no Chromium installed (Debian package chromium)")
def test_page_renders_in_headless_chromium(demo, tmp_path):
    flags = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
             "--disable-background-networking", "--disable-component-update",
             "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}"]
    url = (demo / "report.html").resolve().as_uri()
    dom = subprocess.run([_BROWSER, *flags, "--dump-dom", url], capture_output=True,
                         text=True, timeout=120, check=True).stdout
    rendered = _Page()
    rendered.feed(dom)
    assert rendered.text["h2"] == SECTIONS
    shot = tmp_path / "page.png"
    subprocess.run([_BROWSER, *flags, "--window-size=1000,1400", f"--screenshot={shot}", url],
                   capture_output=True, timeout=120, check=True)
    pixels = matplotlib.image.imread(shot)
    # not a blank page: both ink and paper, and a good share of ink
    grey = pixels[..., :3].mean(axis=2)
    assert grey.min() < 0.2 and grey.max() > 0.9 and (grey < 0.8).mean() > 0.01


def test_matrix_figure_marks_threshold_and_frequencies(demo, demo_chip):
    from xtalkcal.measure import load_protocol
    from xtalkcal.outputs import calibration_from_ledger
    from xtalkcal.store import Ledger

    led = Ledger(demo / "ledger")
    chip = demo_chip
    proto = load_protocol(Path(__file__).parents[1] / "protocols" / "full.toml")
    cal = calibration_from_ledger(led, chip, proto)
    ax = plot_matrix_db(cal)
    labels = [t.get_text() for t in ax.get_xticklabels()]
    assert labels[4].startswith("q4-line\n") and labels[4].endswith(f"{cal.pairs[0].freq_ghz:.3f}")
    bar = ax.images[0].colorbar
    levels = [ln.get_ydata()[0] for ln in bar.ax.lines]
    assert proto.survey.threshold_db in levels
    assert "survey threshold" in bar.ax.get_ylabel()


class _FakeRB:
    """An RB comparison of made-up numbers: small isolated errors, one bad pair."""

    def to_dataset(self):
        conds = ["isolated", "uncompensated", "compensated"]
        v = np.array([[1.2e-5, 3.0e-5], [4e-4, 1.5e-3], [1.3e-5, 3.1e-5]])
        return xr.Dataset({"error_per_gate": (("condition", "qubit"), v),
                           "error_per_gate_stderr": (("condition", "qubit"), 0.1 * v)},
                          coords={"condition": conds, "qubit": ["q0", "q1"]})


def test_gate_errors_read_below_five_in_ten_thousand():
    ax = plot_gate_errors(_FakeRB(), chip="made-up")
    lo, hi = ax.get_ylim()
    ticks = [t for t in ax.get_yticks() if lo <= t <= hi]
    # ticks (in units of 1e-4) down at the isolated errors, 0.12 and 0.30
    assert min(ticks) <= 0.12 and any(0.1 <= t < 5 for t in ticks)
    assert ax.get_ylabel() == "error per gate (×10⁻⁴)"
    assert "made-up" in ax.get_title()
    # the toolkit's own colours, not a plotting library's default cycle
    used = {tuple(np.round(matplotlib.colors.to_rgb(ln.get_color()), 3)) for ln in ax.lines
            if ln.get_marker() not in (None, "None", "", "_")}
    ours = {tuple(np.round(matplotlib.colors.to_rgb(c), 3)) for c in COLOURS.values()}
    assert used and used <= ours
