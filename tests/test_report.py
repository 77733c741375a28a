"""The reports as a reader meets them: check.html and processing.html in a real headless browser
on a 1,280 x 800 laptop window, and the terminal report.

The browser is the OS's Chromium (Debian package ``chromium``; ``.ci/run`` installs it when it
is missing) driven through the playwright package, which is pointed at it and downloads no
browser of its own.
"""

from __future__ import annotations

import os
import re
import shutil
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

import stimforge
from stimforge.audio_io import read_tsv
from stimforge.cli import main

ROOT = Path(__file__).resolve().parents[1]
CHROMIUM = Path("/usr/bin/chromium")
ARGS = ["--no-sandbox", "--headless", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--no-first-run"]
WINDOW = {"width": 1280, "height": 800}  # a common laptop screen (the target)

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """The demo, built and checked (its report object keeps the figures' data)."""
    out = tmp_path_factory.mktemp("report") / "demo"
    return stimforge.build(ROOT / "recipes" / "demo.yaml", out=out, progress=False)


@pytest.fixture(scope="module")
def browser():
    sync_api = pytest.importorskip("playwright.sync_api")
    if not CHROMIUM.is_file():
        msg = f"{CHROMIUM} is missing: apt-get install chromium (.ci/run does)"
        if os.environ.get("CI"):
            pytest.fail(msg)
        pytest.skip(msg)
    with sync_api.sync_playwright() as p:
        b = p.chromium.launch(executable_path=str(CHROMIUM), args=ARGS, headless=True)
        yield b
        b.close()


_LAYOUT = """() => {
  const box = el => { if (!el) return null; const r = el.getBoundingClientRect();
    return {top: r.top, bottom: r.bottom, left: r.left, right: r.right, width: r.width}; };
  const table = document.querySelector("table");
  return {
    scrollWidth: document.documentElement.scrollWidth, innerWidth: window.innerWidth,
    images: [...document.images].map(i => ({complete: i.complete, natural: i.naturalWidth,
                                             box: box(i)})),
    verdict: box(document.querySelector("h1.verdict")),
    verdictText: (document.querySelector("h1.verdict") || {}).textContent,
    key: box(document.querySelector("#key img")),
    sensitivity: box(document.querySelector("#sensitivity")),
    allTests: box(document.querySelector("#tests")),
    firstTableIn: table ? (table.closest("section") || {}).id : null,
    audio: [...document.querySelectorAll("audio")].map(a => a.getAttribute("src")),
    flagged: document.querySelectorAll("table.all tr.flag").length,
    rows: document.querySelectorAll("table.all tbody tr").length,
  };
}"""


def _open(browser, page_path: Path, shot: Path):
    page = browser.new_page(viewport=WINDOW)
    page.goto(page_path.as_uri())
    page.wait_for_load_state("load")
    info = page.evaluate(_LAYOUT)
    page.screenshot(path=str(shot))
    page.close()
    print(f"{page_path.name}: {info['scrollWidth']} px wide, {len(info['images'])} images; "
          f"screenshot {shot}")
    return info


def _fits_the_window(info):
    assert info["scrollWidth"] <= WINDOW["width"], info["scrollWidth"]  # no sideways scroll
    assert info["images"], "no figure on the page"
    for im in info["images"]:
        assert im["complete"] and im["natural"] > 0, im  # every image loaded
        assert im["box"]["right"] <= WINDOW["width"], im


def test_check_page_on_a_laptop_screen(demo, browser, tmp_path):
    page_path = demo.out / "check" / "check.html"
    info = _open(browser, page_path, tmp_path / "check.png")
    _fits_the_window(info)
    # the verdict and the key figure on the first screen, no table before the sensitivity
    assert info["verdict"]["bottom"] <= WINDOW["height"]
    assert demo.check.verdict in info["verdictText"]
    assert info["key"] is not None and 0 <= info["key"]["top"]
    assert info["key"]["bottom"] <= WINDOW["height"], info["key"]
    assert info["firstTableIn"] == "sensitivity", info["firstTableIn"]
    assert info["sensitivity"]["top"] < info["allTests"]["top"]
    # one player per condition, linking a stimulus file beside the report (not embedded)
    conds = list(demo.check.design["conditions"])
    assert len(info["audio"]) == len(conds) == 4  # the demo's 4 conditions (recipes/demo.yaml)
    for src in info["audio"]:
        assert not src.startswith("data:") and (page_path.parent / src).resolve().is_file(), src
    assert info["rows"] == len(demo.check.family) and info["flagged"] == len(
        demo.check.significant)


def test_key_figure_labels_every_rate_and_draws_the_thresholds(demo):
    from matplotlib.figure import Figure

    fig = demo.check.plot()
    assert isinstance(fig, Figure)
    w, h = fig.get_size_inches() * fig.dpi
    assert w <= 1200 and h <= 450  # fits a 1,280 px window beside the page margins
    names = [lv["name"] for lv in demo.check.design["levels"]]
    top = [ax for ax in fig.axes if ax.get_xlabel() == "" and ax.get_title()]
    for ax in top:  # each condition's spectrum names every level at its rate
        sec = [c for c in ax.child_axes]
        labels = {t.get_text() for s in sec for t in s.get_xticklabels()}
        assert set(names) <= labels, labels
        # the one-test and the family-wise thresholds are drawn as horizontal lines
        flat = [ln for ln in ax.get_lines() if len(set(ln.get_ydata())) == 1]
        assert len(flat) >= 2


def test_processing_page_on_a_laptop_screen(demo, browser, tmp_path):
    page_path = demo.out / "check" / "processing.html"
    info = _open(browser, page_path, tmp_path / "processing.png")
    _fits_the_window(info)
    html = page_path.read_text(encoding="utf-8")
    man = demo.manifest
    # every processed token has a row, with its F0 and loudness before and after
    n_tok = len(man["tokens"])
    assert html.count("<tr") >= n_tok
    first = man["tokens"][0]
    assert f">{first['f0_before_hz']:.1f}<" in html and f">{first['rms_after_dbfs']:.2f}<" in html
    assert "href='check.html'" in html and "href='processing.html'" in (
        demo.out / "check" / "check.html").read_text(encoding="utf-8")
    assert "the same counts in every condition" in html  # the demo is balanced (design.py)


def _plant_line_cue(src: Path, dst: Path, db: float) -> Path:
    """A copy of a build with every line-initial syllable raised by ``db`` (a planted cue)."""
    shutil.copytree(src, dst)
    rows = [r for r in read_tsv(dst / "units.tsv") if r["level"] == "syllable"]
    gain = 10 ** (db / 20)
    by_file: dict[str, list[dict]] = {}
    for r in rows:
        by_file.setdefault(r["stim_file"], []).append(r)
    for name, units in by_file.items():
        x, sr = sf.read(dst / name)
        for u in units:
            if int(u["index"]) % 4 == 0:  # demo: 2 syllables a word, 2 words a line
                a = int(round(float(u["onset"]) * sr))
                b = a + int(round(float(u["duration"]) * sr))
                x[a:b] *= gain
        sf.write(dst / name, np.clip(x, -1, 1), sr, subtype="PCM_24")
    return dst


def test_a_page_with_a_cue_highlights_it_on_the_first_screen(demo, browser, tmp_path):
    from stimforge.verify import check_build

    cued = _plant_line_cue(demo.out, tmp_path / "cued", db=3.0)
    rep = check_build(cued, sensitivity=False, progress=False)
    assert not rep.passed
    page_path = rep.write_html(tmp_path / "page")
    info = _open(browser, page_path, tmp_path / "cue.png")
    _fits_the_window(info)
    assert "CUE FOUND" in info["verdictText"] and info["verdict"]["bottom"] <= WINDOW["height"]
    assert info["flagged"] == len(rep.significant) > 0
    for src in info["audio"]:  # from another folder, the players still find the files
        assert (page_path.parent / src).resolve().is_file(), src
    text = rep.format_text()
    assert text.splitlines()[0] == "verdict: CUE FOUND (exit 1)"
    strongest = text.splitlines()[1]  # the planted cue, in plain words
    assert "loudness" in strongest and "rms_db" not in text, strongest


def test_terminal_report_verdict_first_names_in_full_units_per_row(demo, capsys):
    rep = demo.check
    text = rep.format_text()
    lines = text.splitlines()
    assert lines[0] == f"verdict: {rep.verdict} (exit {rep.exit_code})"
    assert len(lines) < 40  # the few tests that matter, not the whole family
    assert "sensitivity" in text and text.count("this set would have shown") <= 1
    full = rep.format_table()
    for cond in rep.design["conditions"]:  # never cut short ("syllables-s...")
        assert re.search(rf"^  {re.escape(cond)} ", full, re.M), cond
    body = full.split("smallest p first:")[1].splitlines()[2:]
    assert len(body) == len(rep.family)
    unit = re.compile(r"(r \d|T2 \d|[-+]?\d[\d.]*(e[-+]?\d+)? (dB|ms|semitones|Hz)\b)")
    assert all(unit.search(ln) for ln in body), [ln for ln in body if not unit.search(ln)][:3]
    for internal in ("rms_db", "active_ms", "f0_st", "level_step"):
        assert internal not in full, internal
    rc = main(["check", str(demo.out), "--table", "--no-sensitivity", "--quiet"])
    out = capsys.readouterr().out
    assert rc == 0 and out.startswith("verdict: ") and "smallest p first:" in out
