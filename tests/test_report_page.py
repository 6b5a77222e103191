"""analysis/report.html as a person sees it: opened in headless Chromium (Debian's package,
which .ci/run installs), screenshot taken, and what it shows compared with summary.json."""

import base64
import io
import json
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import matplotlib.image
import numpy as np
import pytest

from boost.analysis import analyse_run
from boost.protocol import load_protocol
from boost.report import write_report
from boost.report_page import CAUTIONS
from boost.scheduler import run_protocol
from conftest import double_well_protocol, run_stopped_before

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
needs_browser = pytest.mark.skipif(CHROMIUM is None, reason="Chromium is not installed (apt-get install chromium)")

TITLE = 'windows <script>document.title = "owned"</script> & friends'
WINDOWS = double_well_protocol(
    title=TITLE, seed=5,
    umbrella={"x": {"centres": {"from": "-0.15 nm", "to": "0.15 nm", "count": 5}, "spring": "2000 kJ/mol/nm**2"}},
    run={"cycle": "0.2 ps", "equilibration": "2 ps", "production": "40 ps", "frame_every": None},
    basins={"left": {"x": ["-1 nm", "0 nm"]}, "right": {"x": ["0 nm", "1 nm"]}})


def _chromium(*args, timeout=120):
    return subprocess.run([CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
                           "--allow-file-access-from-files", *args], capture_output=True, text=True, timeout=timeout)


class _Page(HTMLParser):
    """Tables (by id) as lists of rows of cell texts, the images' sources, script elements, h1."""

    def __init__(self):
        super().__init__()
        self.tables, self.images, self.scripts, self.h1 = {}, [], 0, ""
        self._table = self._row = self._cell = None
        self._in_h1 = False

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "table":
            self._table = self.tables.setdefault(attrs.get("id", f"table{len(self.tables)}"), [])
        elif tag == "tr" and self._table is not None:
            self._row = []
            self._table.append(self._row)
        elif tag in ("td", "th") and self._row is not None:
            self._cell = []
        elif tag == "img":
            self.images.append(attrs.get("src", ""))
        elif tag == "script":
            self.scripts += 1
        elif tag == "h1":
            self._in_h1 = True

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None:
            self._row.append("".join(self._cell).strip())
            self._cell = None
        elif tag == "table":
            self._table = self._row = None
        elif tag == "h1":
            self._in_h1 = False

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)
        if self._in_h1:
            self.h1 += data


@pytest.fixture(scope="module")
def analysed(tmp_path_factory):
    base = tmp_path_factory.mktemp("page")
    (base / "p.yaml").write_text(WINDOWS)
    protocol = load_protocol(base / "p.yaml")
    folder = run_protocol(protocol, base / "run", progress=False)
    out = write_report(analyse_run(folder, energy_unit="kT"))
    return out


def _rendered(page):
    result = _chromium("--dump-dom", page.resolve().as_uri())
    assert result.returncode == 0, result.stderr[-2000:]
    parsed = _Page()
    parsed.feed(result.stdout)
    return parsed


@needs_browser
def test_the_page_shows_the_numbers_of_summary_json(analysed):
    summary = json.loads((analysed / "summary.json").read_text())
    page = _rendered(analysed / "report.html")
    header, *rows = page.tables["populations"]
    assert header[:2] == ["basin", "population"]
    assert [row[0] for row in rows] == list(summary["basins"])
    for row in rows:
        basin = summary["basins"][row[0]]
        # shown to 4 decimals: equal to summary.json's value within half a unit of the last digit
        for cell, key in zip(row[1:5], ("population", "population error", "population 95% low",
                                         "population 95% high")):
            assert abs(float(cell) - basin[key]) <= 0.5e-4 + 1e-12, (row, key)
        assert row[5] == basin["verdict"]["word"]
    header, (row,) = page.tables["differences"][0], page.tables["differences"][1:]
    (difference,) = summary["free-energy differences"]
    assert abs(float(row[1]) - difference["ΔG (kT)"]) <= 0.5e-3 + 1e-12
    assert abs(float(row[2]) - difference["ΔG error (kT)"]) <= 0.5e-3 + 1e-12
    header, *rows = page.tables["conditions"]
    assert [row[0] for row in rows] == [c["label"] for c in summary["conditions"]]
    for row, condition in zip(rows, summary["conditions"]):
        assert int(row[1]) == condition["samples used"]
        assert int(row[3]) == condition["equilibration discarded (cycles)"]
        assert abs(float(row[4]) - condition["statistical inefficiency (cycles)"]) <= 0.05 + 1e-12


@needs_browser
def test_every_image_decodes_and_the_screenshot_is_not_blank(analysed, tmp_path):
    page = _rendered(analysed / "report.html")
    pngs = sorted(p.name for p in analysed.glob("*.png"))
    assert len(page.images) == len(pngs) >= 4          # PMF, windows, overlap, convergence
    for src in page.images:
        assert src.startswith("data:image/png;base64,")   # inlined: the page needs nothing beside it
        pixels = matplotlib.image.imread(io.BytesIO(base64.b64decode(src.split(",", 1)[1])), format="png")
        assert pixels.shape[0] > 100 and pixels.shape[1] > 100
    shot = tmp_path / "page.png"
    result = _chromium(f"--screenshot={shot}", "--window-size=1280,2400", (analysed / "report.html").resolve().as_uri())
    assert result.returncode == 0 and shot.exists(), result.stderr[-2000:]
    pixels = matplotlib.image.imread(shot)
    assert pixels.shape[:2] == (2400, 1280)
    # a rendered page has text and plots: many distinct colours, not one background
    assert len(np.unique(pixels[..., :3].reshape(-1, 3), axis=0)) > 50


@needs_browser
def test_user_text_is_shown_as_text(analysed):
    page = _rendered(analysed / "report.html")
    assert page.scripts == 0                                # the title's <script> did not become one
    assert page.h1 == TITLE


def test_the_page_is_one_file_without_outside_references(analysed):
    text = (analysed / "report.html").read_text()
    assert not re.search(r"(src|href)=\"(?!data:)", text)
    assert "<script" not in text.replace("&lt;script", "")


def test_cautions_are_the_readmes():
    readme = " ".join((Path(__file__).resolve().parents[1] / "README.md").read_text().split())
    for caution in CAUTIONS:
        assert " ".join(caution.split()) in readme, caution


@needs_browser
def test_a_run_analysed_before_its_end_says_partial(tmp_path):
    (tmp_path / "p.yaml").write_text(WINDOWS)
    protocol = load_protocol(tmp_path / "p.yaml")
    run_stopped_before(protocol, tmp_path / "run", 150)      # as a run still going looks to the analysis
    out = write_report(analyse_run(tmp_path / "run", energy_unit="kT"))
    result = _chromium("--dump-dom", (out / "report.html").resolve().as_uri())
    text = re.sub(r"\s+", " ", re.sub(r"<[^>]+>", " ", result.stdout))
    assert f"partial, cycle 150 of {protocol.run.n_cycles}" in text


@needs_browser
def test_exchange_runs_show_their_swaps_and_round_trips(tmp_path):
    from conftest import SHORT_LADDER

    (tmp_path / "p.yaml").write_text(SHORT_LADDER.replace("300 ps", "60 ps").replace("20 ps", "4 ps"))
    out = write_report(analyse_run(run_protocol(load_protocol(tmp_path / "p.yaml"), tmp_path / "run",
                                                progress=False), energy_unit="kT"))
    summary = json.loads((out / "summary.json").read_text())
    page = _rendered(out / "report.html")
    header, *rows = page.tables["swaps"]
    assert len(rows) == len(summary["neighbour swaps"]) == 3
    for row, swap in zip(rows, summary["neighbour swaps"]):
        assert abs(float(row[1]) - swap["acceptance"]) <= 0.5e-3 + 1e-12
        assert int(row[2]) == swap["attempts"]
    assert len(page.images) == len(list(out.glob("*.png")))
