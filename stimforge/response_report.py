"""The HTML report of a response analysis: one page that fits a 1280 px screen.

:func:`write_report` writes ``analysis.html`` into a folder and its figures as PNG files beside
it (``analysis_figures/``), so the page stays light for a group of 30 participants and every
figure can be reused on its own.  The page holds, from the top: the summary and the settings
(rates, window and DFT, the test, the correction and its family, the noise bins and their
source), the cautions, the group tables and figures (several participants), and per
participant the significant findings, the phase comparison between hearings, SNR spectra
with each level's rate labelled, ITPC by frequency with the Rayleigh critical lines, polar
phase plots per hearing and topographies when channel positions are known.

Figures are :class:`matplotlib.figure.Figure` objects saved directly (no pyplot, no backend
switch); every one is at most 1200 px wide.
"""

from __future__ import annotations

import html
import re
from pathlib import Path
from typing import Any

from .errors import AnalysisError
from .response import CAUTION, CORRECTIONS, NEIGHBOUR_SOURCE, TESTS, ResponseAnalysis, _cell

__all__ = ["write_report", "REPORT_NAME", "FIGURE_DIR", "is_our_report"]

REPORT_NAME = "analysis.html"
FIGURE_DIR = "analysis_figures"
_TITLE = "stimforge response analysis"
_DPI = 100  # figures are <= 12 in wide -> <= 1200 px

_CSS = """
body { font-family: system-ui, sans-serif; max-width: 1240px; margin: 0 auto; padding: 0 16px;
       color: #222; font-size: 14px; }
h1 { font-size: 22px; } h2 { font-size: 18px; margin-top: 28px; border-bottom: 1px solid #ccc; }
h3 { font-size: 15px; }
table { border-collapse: collapse; margin: 6px 0 12px; font-size: 12.5px; }
th, td { border: 1px solid #ddd; padding: 2px 6px; text-align: right; white-space: nowrap; }
th { background: #f3f3f3; } td:first-child, th:first-child { text-align: left; }
tr.sig td { background: #fff3cd; font-weight: 600; }
.summary { font-size: 15px; padding: 8px 12px; background: #eef5fb; border-left: 4px solid #1b6ca8; }
.caution { padding: 8px 12px; background: #fbf1ee; border-left: 4px solid #c0392b; }
.notes { color: #555; font-size: 12.5px; }
figure { margin: 8px 0 16px; } figure img { max-width: 100%; height: auto; }
figcaption { font-size: 12.5px; color: #444; }
.wrap { overflow-x: auto; max-width: 100%; }
"""

_F_COLS = ("condition", "channel", "level", "harmonic", "rate_hz", "n_trials", "amplitude",
           "snr_db", "power_snr_db", "itpc", "itpc_null", "t2circ_p", "p", "p_corrected",
           "significant")
_PH_COLS = ("condition", "channel", "level", "harmonic", "rate_hz", "n_items", "itpc_first",
            "itpc_second", "difference_deg", "difference_ms", "ci_deg", "p", "p_corrected",
            "significant")
_G_COLS = ("condition", "channel", "level", "harmonic", "rate_hz", "n_participants",
           "itpc_mean", "itpc_null_mean", "t", "p", "p_corrected", "significant", "snr_db_mean",
           "snr_p", "t2circ_p")
_C_COLS = ("condition_a", "condition_b", "channel", "level", "harmonic", "rate_hz",
           "n_participants", "itpc_difference", "p", "p_corrected", "significant")
_GP_COLS = ("condition", "channel", "level", "harmonic", "rate_hz", "n_participants",
            "difference_deg", "difference_ms", "ci_deg", "p", "p_corrected", "significant")


def is_our_report(path: Path) -> bool:
    """True for a page an earlier ``stimforge analyze --report`` wrote."""
    try:
        head = path.read_text(encoding="utf-8", errors="replace")[:2000]
    except OSError:
        return False
    return f"<title>{_TITLE}" in head


def _table(rows: list[dict], cols: tuple[str, ...], *, limit: int = 24) -> str:
    if not rows:
        return "<p class='notes'>(none)</p>"
    head = "".join(f"<th>{html.escape(c.replace('_', ' '))}</th>" for c in cols)
    body = "".join(
        "<tr" + (" class='sig'" if r.get("significant") else "") + ">"
        + "".join(f"<td>{_cell(r.get(c))}</td>" for c in cols) + "</tr>" for r in rows[:limit])
    more = (f"<p class='notes'>{len(rows) - limit} more rows in the JSON (--json)</p>"
            if len(rows) > limit else "")
    return f"<div class='wrap'><table><tr>{head}</tr>{body}</table></div>{more}"


def _order(rows: list[dict]) -> list[dict]:
    """Significant rows first, then structure rates by p."""
    return sorted(rows, key=lambda r: (not r.get("significant"), r.get("kind") != "structure",
                                       r.get("p") if r.get("p") is not None else 2.0))


def _safe(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", name)[:60] or "x"


def write_report(analysis: ResponseAnalysis, folder: str | Path) -> Path:
    """Write ``analysis.html`` and its PNG figures into ``folder``.

    Parameters
    ----------
    analysis : ResponseAnalysis
    folder : path
        Created if missing.  An existing ``analysis.html`` that an earlier analysis did not
        write is refused (stimforge never writes over the user's files).

    Returns
    -------
    Path
        The page.
    """
    folder = Path(folder)
    page = folder / REPORT_NAME
    figdir = folder / FIGURE_DIR
    if page.exists() and not is_our_report(page):
        raise AnalysisError(f"{page} exists and is not a stimforge analysis report; choose "
                            "another --report folder")
    if figdir.exists() and not page.exists() and any(figdir.iterdir()):
        raise AnalysisError(f"{figdir} exists and holds files that no stimforge report wrote; "
                            "choose another --report folder")
    figdir.mkdir(parents=True, exist_ok=True)
    parts: list[str] = []

    def figure(fig: Any, name: str, caption: str) -> None:
        if fig is None:
            return
        path = figdir / f"{_safe(name)}.png"
        fig.savefig(path, dpi=_DPI, format="png")
        parts.append(f"<figure><img src='{FIGURE_DIR}/{html.escape(path.name)}' "
                     f"alt='{html.escape(caption)}'/><figcaption>{html.escape(caption)}"
                     "</figcaption></figure>")

    s = analysis.settings
    grid = analysis.grid
    levels = ", ".join(f"{r.name} {r.rate:.4g} Hz" for r in grid.rates.rows)
    parts.append(f"<h1>{_TITLE}</h1>")
    parts.append(f"<p class='summary'>{html.escape(analysis.summary_line())}</p>")
    settings = [
        ("rates", f"{levels} (from {s['rates_from']})"),
        ("targets", ", ".join(t.label for t in grid.targets)),
        ("window", grid.describe_dft()),
        ("test", TESTS[s["test"]] + "; p of every finding; ITPC, evoked SNR and power SNR "
                 "shown beside it"),
        ("correction", f"{CORRECTIONS[s['correction']]} at alpha {s['alpha']:g}, {s['family']}"),
        ("noise bins", f"{s['neighbours']['n_side']} on each side beyond "
                       f"{s['neighbours']['skip']} adjacent bin(s), structure bins left out"
                       + (f" (the default: {NEIGHBOUR_SOURCE})"
                          if (s["neighbours"]["skip"], s["neighbours"]["n_side"]) == (1, 4)
                          else "")),
        ("group test", s["group_test"]),
        ("phase", "circular mean of single-trial phases per hearing; difference = second - "
                  "first (+ = second hearing leads); bootstrap 95% CI over items "
                  f"({s['n_boot']} resamples); permutation swapping hearings within items "
                  f"({s['n_perm']}, or all swaps when fewer)"),
        ("seed", str(s["seed"])),
    ]
    parts.append("<table>" + "".join(f"<tr><th>{html.escape(k)}</th><td style='text-align:left;"
                                     f"white-space:normal'>{html.escape(v)}</td></tr>"
                                     for k, v in settings) + "</table>")
    parts.append(f"<p class='caution'>{html.escape(CAUTION)} A phase difference is only "
                 "defined modulo one cycle: +60 deg is also -300 deg, so read the milliseconds "
                 "as the shortest shift. ITPC and SNR need the same trial count to be compared "
                 "(ITPC's null mean falls as 1/sqrt(n)).</p>")
    if analysis.notes:
        parts.append("<ul class='notes'>" + "".join(f"<li>{html.escape(n)}</li>"
                                                    for n in analysis.notes) + "</ul>")
    if len(analysis.participants) > 1:
        parts.append("<p class='notes'>Participants: " + " &middot; ".join(
            f"<a href='#p-{_safe(p.participant)}'>{html.escape(p.participant)}</a>"
            for p in analysis.participants) + "</p>")
        parts.append(f"<h2>Group ({len(analysis.participants)} participants)</h2>")
        parts.append("<h3>Responses across participants</h3>")
        parts.append(_table(_order(analysis.group_rows), _G_COLS))
        figure(analysis.plot_group(), "group_itpc",
               "Per-participant ITPC minus its null expectation at each structure rate, for the "
               "channel with the smallest group p (grey: participants; red: mean +- SE).")
        figure(analysis.plot_topomap(), "group_topomap",
               "Group topographies of the mean ITPC minus its null expectation; white dots: "
               "significant across participants.")
        if analysis.contrast_rows:
            parts.append("<h3>Condition contrasts (sign-flip permutation, paired by "
                         "participant)</h3>")
            parts.append(_table(_order(analysis.contrast_rows), _C_COLS))
        if analysis.group_phase_rows:
            parts.append("<h3>Phase shift between hearings across participants (sign-flip "
                         "test of the per-participant differences)</h3>")
            parts.append(_table(_order(analysis.group_phase_rows), _GP_COLS))
    for p in analysis.participants:
        tag = _safe(p.participant)
        parts.append(f"<h2 id='p-{tag}'>{html.escape(p.participant)}</h2>")
        conds = ", ".join(f"{c} ({n} trials)" for c, n in p.conditions.items())
        parts.append(f"<p>{html.escape(p.summary_line())}<br/><span class='notes'>"
                     f"{html.escape(p.source)}; {conds}; amplitudes in {html.escape(p.units)}"
                     "</span></p>")
        if p.notes:
            parts.append("<ul class='notes'>" + "".join(f"<li>{html.escape(n)}</li>"
                                                        for n in p.notes) + "</ul>")
        sig = [r for r in _order(p.finding_rows) if r.get("significant")]
        parts.append(f"<h3>Significant findings ({len(sig)} of {len(p.finding_rows)} tests)</h3>")
        parts.append(_table(sig, _F_COLS, limit=len(sig) or 1))
        if p.phase_rows:
            rows = [r for r in p.phase_rows if r["kind"] == "structure"]
            rows.sort(key=lambda r: (not r["responding"], r["p"]))
            responding = [r for r in rows if r["responding"]]
            parts.append("<h3>Phase, second minus first hearing, where the rate responds</h3>")
            parts.append(_table(responding, _PH_COLS, limit=len(responding) or 1))
        figure(p.plot_spectra(), f"{tag}_snr",
               "Evoked SNR (amplitude over the mean of the noise bins) at every frequency; grey: "
               "channels, black: their mean, orange: the channel with the smallest p; vertical "
               "lines: the design's rates.")
        figure(p.plot_itpc(), f"{tag}_itpc",
               "Inter-trial phase coherence by frequency with the Rayleigh critical r (dashed: "
               "one test; dotted: after correction) and the null mean.")
        for c in p.phasors:
            figure(p.plot_phase(condition=c), f"{tag}_polar_{_safe(c)}",
                   f"{c}: single-trial phases at the structure rates (blue: first hearing, "
                   "orange: second); arrows: mean vectors, length = ITPC.")
        figure(p.plot_topomap(), f"{tag}_topomap",
               "Topographies of ITPC per condition and rate; white dots: significant channels.")
        parts.append(f"<details><summary>All {len(p.finding_rows)} tests of {html.escape(p.participant)} "
                     "(significant first)</summary>"
                     + _table(_order(p.finding_rows), _F_COLS, limit=len(p.finding_rows))
                     + "</details>")
        if p.phase_rows:
            rows = [r for r in p.phase_rows if r["kind"] == "structure"]
            rows.sort(key=lambda r: (not r["responding"], r["p"]))
            parts.append("<details><summary>Phase rows of every channel and rate (where the rate "
                         "shows no response the phase is that of noise)</summary>"
                         + _table(rows, _PH_COLS, limit=len(rows)) + "</details>")
    doc = ("<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'/>"
           f"<title>{_TITLE}</title><meta name='viewport' content='width=device-width'/>"
           f"<style>{_CSS}</style></head><body>" + "\n".join(parts) + "</body></html>\n")
    page.write_text(doc, encoding="utf-8")
    return page
