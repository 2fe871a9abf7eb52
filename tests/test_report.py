"""What a person reads about a run: one modes table everywhere, and report.html, self-contained.

Outside references: the HTML standard's parser as Python's html.parser implements it (the page is checked for
anything it would fetch), and a real browser, Debian's chromium, that opens the page headless and takes a
screenshot of it.
"""

import re
import shutil
import subprocess
from html.parser import HTMLParser

import matplotlib.colors
import matplotlib.image
import numpy as np
import pytest

from climodes import figures
from climodes.maps import DIVERGING, symmetric_levels
from climodes.report import TABLE_HEAD, mode_rows, units_text, variance_table
from climodes.results import open_results
from conftest import write_config
from diagnosed import diagnosed, rewrite


@pytest.fixture
def drawn_run(tmp_path, small_field, cli):
    """A run with its maps drawn at a low resolution, and what it printed."""
    config = write_config(tmp_path, [small_field], modes={"count": 3},
                          output={"figures": {"dpi": 50, "draw": ["maps"]}})
    code, out, err = cli("run", config)
    assert code == 0, err
    return tmp_path / "out", out


class _Page(HTMLParser):
    """Every tag, attribute and piece of text of a page, as a browser's parser sees them."""

    def __init__(self):
        super().__init__()
        self.tags, self.attributes, self.text = [], [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.attributes += [(tag, name, value or "") for name, value in attrs]

    def handle_data(self, data):
        self.text.append(data)


def _parsed(path) -> _Page:
    page = _Page()
    page.feed(path.read_text(encoding="utf-8"))
    return page


def test_one_modes_table_for_summary_log_show_figures_and_report(drawn_run, cli):
    folder, printed = drawn_run
    ds = open_results(folder)
    table = variance_table(ds)
    assert printed.splitlines()[1:1 + len(table)] == table  # the run's summary
    assert "\n".join(table) in (folder / "run.log").read_text()
    shown = cli("show", folder)[1]
    assert "\n".join(f"  {line}" for line in table) in shown
    page = (folder / "report.html").read_text(encoding="utf-8")
    for k, row in enumerate(mode_rows(ds)):
        assert f"{row.share:>7} +/- {row.error:<7}" in table[k + 1]
        assert f"<td>{row.variance()}</td>" in page
        fig = figures.mode_map(ds, k)
        assert fig.texts[0].get_text() == f"Mode {row.mode}: {row.variance()} of the variance"
        figures.plt.close(fig)


def test_table_shows_significance_and_sample_size_when_the_file_has_them(drawn_run):
    folder, _ = drawn_run
    ds = diagnosed(open_results(folder))
    ds["significant"][:] = [1, 1, 0]
    lines = variance_table(ds)
    assert lines[0].split() == ["mode", "variance", "explained", "effective", "N", "separated", "(North)", "red",
                                "noise", "95%", "significant"]
    assert [line.split()[-1] for line in lines[1:4]] == ["yes", "yes", "no"]
    assert [line.split()[4] for line in lines[1:4]] == [f"{float(n):.0f}" for n in ds["effective_sample_size"]]
    assert lines[4].startswith("effective N: each mode's own effective sample size")
    assert "99 red-noise fields" in lines[5]
    assert mode_rows(ds)[2].flags == ["not significant: within red noise"]


def test_report_is_one_file_with_nothing_fetched_from_elsewhere(drawn_run):
    folder, _ = drawn_run
    rewrite(folder, diagnosed(open_results(folder)))
    from climodes.pipeline import redraw

    redraw(folder, draw=["maps", "series", "pairs", "spectrum", "residuals"])
    page = _parsed(folder / "report.html")
    assert not {"script", "link", "iframe", "object", "embed", "base", "frame"} & set(page.tags)
    for tag, name, value in page.attributes:
        if name in ("src", "href", "srcset", "poster", "data", "action", "background"):
            assert value.startswith("data:") or value.startswith("#"), (tag, name, value[:80])
        assert not name.startswith("on"), (tag, name)  # no script in attributes either
    styles = page.text[page.tags.index("style")] if "style" in page.tags else ""
    assert "url(" not in styles and "@import" not in styles and "@font-face" not in styles
    text = re.sub(r"data:[^\"]*", "", (folder / "report.html").read_text(encoding="utf-8"))  # the images aside
    assert "http" not in text and "//" not in text and "ftp:" not in text
    images = [v for t, n, v in page.attributes if t == "img" and n == "src"]
    assert len(images) == len(list((folder / "figures").iterdir())) == 12  # every figure, embedded
    assert all(v.startswith("data:image/png;base64,") for v in images)
    words = " ".join(page.text)
    for heading in ("Run", "Modes", "Maps of the modes", "Rotated modes", "Principal components", "Mode pairs",
                    "Variance spectrum", "Residuals", "Notes", "Resolved config", "time taken", "where it ran"):
        assert heading in words, heading
    ds = open_results(folder)
    assert ds.attrs["climodes_elapsed_seconds"] > 0 and "worker" in ds.attrs["climodes_compute"]
    assert ds.attrs["climodes_compute"] in words


def test_report_without_figures(tmp_path, small_field, cli):
    assert cli("run", write_config(tmp_path, [small_field], modes={"count": 2}))[0] == 0
    page = _parsed(tmp_path / "out" / "report.html")
    assert "img" not in page.tags and "No figures were drawn" in " ".join(page.text)
    assert not (tmp_path / "out" / "figures").exists()


def _chromium() -> str | None:
    return shutil.which("chromium") or shutil.which("chromium-browser")


@pytest.mark.slow
@pytest.mark.skipif(_chromium() is None, reason="Debian's chromium is not installed here (apt-get install "
                    "chromium; .ci/run installs it when it runs as root)")
def test_report_opens_in_a_browser_showing_the_table_and_the_first_map(drawn_run, tmp_path):
    folder, _ = drawn_run
    shot = tmp_path / "screen.png"
    profile = tmp_path / "profile"
    profile.mkdir()
    done = subprocess.run(
        [_chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         f"--user-data-dir={profile}", "--window-size=1200,1700", "--hide-scrollbars",
         f"--screenshot={shot}", (folder / "report.html").as_uri()],
        capture_output=True, text=True, timeout=120)
    assert shot.exists(), done.stderr[-2000:]
    image = (matplotlib.image.imread(shot)[..., :3] * 255).round().astype(int)

    def rows_with(colour, tolerance=12) -> np.ndarray:
        rgb = np.array(matplotlib.colors.to_rgb(colour)) * 255
        return np.flatnonzero((np.abs(image - rgb).sum(axis=-1) < tolerance).sum(axis=1) > 40)

    table = rows_with(TABLE_HEAD)
    assert table.size >= 15, "the modes table's heading is not on screen"
    ds = open_results(folder)
    values = ds["eof"].isel(mode=0).values
    levels = symmetric_levels(values)
    shades = matplotlib.colormaps[DIVERGING].resampled(len(levels) - 1)
    below = image[table.max():]
    hits = np.zeros(below.shape[:2], bool)
    for i in range(shades.N):
        rgb = np.array(shades(i)[:3]) * 255
        hits |= np.abs(below - rgb).sum(axis=-1) < 12
    assert hits.sum() > 20_000, "the first map is not on screen below the table"
    assert units_text(ds["eof"].attrs["units"]) == "K"


def test_small_shares_keep_two_significant_digits():
    """A mode of 0.04 % is not "0.0%" (common practice: never print a non-zero share as zero)."""
    from climodes.report import percent

    assert [percent(x) for x in (0.2334, 0.012, 0.00042, 0.0000123, 0.0)] == ["23.3%", "1.2%", "0.042%", "0.0012%",
                                                                            "0.0%"]
