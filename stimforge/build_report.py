"""A build's own report: what processing did to every token, and how the set is balanced.

``check/processing.html`` sits beside the acoustic check's ``check.html``.  It shows, per
token, the F0 and the loudness before and after processing, the stretch factor, the
alignment shift and the gain, with the corpus QC flags and any warnings (all from the
manifest's ``tokens`` and ``corpus_qc``); the label and token balance across conditions (the
manifest's ``design``); and the trials' BS.1770 loudness (``trials.tsv``).  The page is written
before the manifest, so the manifest's ``outputs`` list it like every other file of the build.

Everything here reads plain data (a manifest dict and the trial rows), so the page can be
made again for any finished build folder with :func:`write_processing_report`.
"""

from __future__ import annotations

import html
import json
from pathlib import Path
from typing import Any

import numpy as np

from .audio_io import MANIFEST, _number, read_tsv
from .errors import StimforgeError
from .verify_report import PAGE_CSS, SORT_SCRIPT, figure_img, new_figure

__all__ = ["token_rows", "processing_html", "write_processing_report", "PAGE"]

#: File name of the page, inside the build's ``check/`` folder.
PAGE = "processing.html"

# manifest token record key -> (column, format); other keys follow as they are
_TOKEN_COLUMNS = [
    ("label", "label", "s"), ("token_id", "token", "s"), ("uses", "uses", "d"),
    ("stretch_factor", "stretch factor", ".3f"),
    ("f0_before_hz", "F0 before (Hz)", ".1f"), ("f0_after_hz", "F0 after (Hz)", ".1f"),
    ("f0_sd_after_st", "F0 SD after (semitones)", ".2f"),
    ("rms_before_dbfs", "loudness before (dBFS RMS)", ".2f"),
    ("rms_after_dbfs", "loudness after (dBFS RMS)", ".2f"),
    ("gain_db", "gain (dB)", "+.2f"), ("peak_after_dbfs", "peak after (dBFS)", ".2f"),
    ("align_shift_ms", "alignment shift (ms)", "+.1f"), ("backend", "backend", "s"),
    ("flags", "QC flags", "s"), ("warnings", "warnings", "s"),
]
_HIDDEN = {"align_shift_s", "n_samples", "n_token", "set_gain_db", "pitch_method",
           "clipped_samples"}


def _h(s: Any) -> str:
    return html.escape(str(s))


def _f(v: Any, fmt: str) -> str:
    if v is None:
        return "n/a"
    if fmt == "s":
        return ", ".join(map(str, v)) if isinstance(v, (list, tuple)) else str(v)
    try:
        x = float(v)
    except (TypeError, ValueError):
        return str(v)
    if not np.isfinite(x):
        return "n/a"
    return format(int(x) if fmt == "d" else x, fmt)


def token_rows(manifest: dict[str, Any]) -> list[dict[str, Any]]:
    """One row per processed token: its processing record with the corpus QC flags and the
    number of uses in the set (``design.token_counts``).

    Parameters
    ----------
    manifest : dict
        A build's ``manifest.json`` content.

    Returns
    -------
    list of dict
        Keys as in the manifest's token records, plus ``uses``, ``flags`` (list of str) and
        ``align_shift_ms``.
    """
    flags = {q.get("token"): list(q.get("flags") or ()) for q in manifest.get("corpus_qc") or ()}
    uses = (manifest.get("design") or {}).get("token_counts") or {}
    rows = []
    for rec in manifest.get("tokens") or ():
        r = dict(rec)
        tid = r.get("token_id")
        r["uses"] = uses.get(tid)
        r["flags"] = flags.get(tid, [])
        shift = r.get("align_shift_s")
        r["align_shift_ms"] = None if shift is None else 1000.0 * float(shift)
        rows.append(r)
    return rows


def _stretch_range(manifest: dict[str, Any]) -> tuple[float, float] | None:
    rng = ((manifest.get("recipe") or {}).get("retime") or {}).get("stretch_range")
    return (float(rng[0]), float(rng[1])) if rng and len(rng) == 2 else None


def _figure(manifest: dict[str, Any], rows: list[dict[str, Any]],
            trials: list[dict[str, Any]]) -> str:
    """Stretch factors, F0 and loudness before/after, trial loudness: one row of panels."""
    fig = new_figure(width_px=1200, height_px=300)
    axes = fig.subplots(1, 4)

    def col(key: str) -> np.ndarray:
        return np.array([np.nan if r.get(key) is None else float(r[key]) for r in rows])

    flagged = np.array([bool(r["flags"] or r.get("warnings")) for r in rows], dtype=bool)
    ax = axes[0]
    sf_ = col("stretch_factor")
    ok = np.isfinite(sf_)
    if ok.any():
        ax.hist(sf_[ok], bins=24, color="#0b6e99", alpha=0.85)
    lim = _stretch_range(manifest)
    if lim:
        for v in lim:
            ax.axvline(v, color="#cf222e", ls="-.", lw=1.0)
        ax.set_title(f"stretch factors (allowed {lim[0]:g}-{lim[1]:g}, dash-dot)", fontsize=9)
    else:
        ax.set_title("stretch factors", fontsize=9)
    ax.set_xlabel("slot / token duration", fontsize=8)
    ax.set_ylabel("tokens", fontsize=8)
    target = manifest.get("pitch_target_hz")
    for ax, (b, a, what, unit, ref) in zip(axes[1:3], (
            ("f0_before_hz", "f0_after_hz", "F0", "Hz", target),
            ("rms_before_dbfs", "rms_after_dbfs", "loudness", "dBFS RMS",
             ((manifest.get("recipe") or {}).get("loudness") or {}).get("target_dbfs")))):
        x, y = col(b), col(a)
        good = np.isfinite(x) & np.isfinite(y)
        if np.any(good):  # one scale on both axes, so a collapsed spread shows as one
            vals = np.concatenate([x[good], y[good]] + ([np.array([float(ref)])] if ref else []))
            lo, hi = float(vals.min()), float(vals.max())
            pad = max((hi - lo) * 0.06, 0.5)
            ax.set_xlim(lo - pad, hi + pad)
            ax.set_ylim(lo - pad, hi + pad)
            ax.plot([lo - pad, hi + pad], [lo - pad, hi + pad], color="#d0d7de", lw=0.8,
                    zorder=0, label="unchanged")
        ax.plot(x[good & ~flagged], y[good & ~flagged], "o", ms=3.5, color="#0b6e99",
                label="tokens")
        if np.any(good & flagged):
            ax.plot(x[good & flagged], y[good & flagged], "s", ms=3.5, mfc="none",
                    color="#c2410c", label="QC flag or warning")
        if ref is not None:
            ax.axhline(float(ref), color="#57606a", ls=":", lw=1.0,
                       label=f"target {ref:.4g} {unit}")
        ax.set_xlabel(f"{what} before ({unit})", fontsize=8)
        ax.set_ylabel(f"{what} after ({unit})", fontsize=8)
        ax.set_title(f"{what}: before and after, per token", fontsize=9)
        ax.legend(fontsize=7, frameon=False)
    ax = axes[3]
    conds = list(dict.fromkeys(str(t.get("condition")) for t in trials))
    seen: dict[str, tuple[str, float]] = {}
    for t in trials:  # each stimulus file once
        if t.get("lufs") is not None:
            seen.setdefault(t["stim_file"], (str(t.get("condition")), float(t["lufs"])))
    for ci, c in enumerate(conds):
        v = [lu for cond, lu in seen.values() if cond == c and np.isfinite(lu)]
        if v:
            ax.plot(np.full(len(v), ci + 1) + np.linspace(-0.15, 0.15, len(v)), v, "o", ms=3,
                    color="#0b6e99")
    ax.set_xticks(np.arange(1, len(conds) + 1), labels=conds, rotation=20, fontsize=7,
                  ha="right")
    ax.set_xlim(0.4, len(conds) + 0.6)
    allv = [lu for _, lu in seen.values() if np.isfinite(lu)]
    if allv:  # at least 2 LU tall: a 0.1 LU spread drawn full height is not a difference
        mid, half = (max(allv) + min(allv)) / 2, max((max(allv) - min(allv)) / 2 * 1.2, 1.0)
        ax.set_ylim(mid - half, mid + half)
    ax.set_ylabel("integrated loudness (LUFS, BS.1770)", fontsize=8)
    ax.set_title("trial loudness per condition", fontsize=9)
    for a in axes:
        a.tick_params(labelsize=7)
    return figure_img(fig, "stretch factors, F0 and loudness before and after, trial loudness")


def _balance_table(counts: dict[str, dict[str, int]]) -> tuple[str, bool]:
    """Labels x conditions; rows whose counts differ across conditions highlighted."""
    conds = list(counts)
    labels = sorted({lab for c in conds for lab in counts[c]})
    body, equal = [], True
    for lab in labels:
        vals = [int(counts[c].get(lab, 0)) for c in conds]
        same = len(set(vals)) == 1
        equal &= same
        tds = "".join(f"<td class='num'>{v}</td>" for v in vals)
        body.append(f"<tr{'' if same else ' class=flag'}><td>{_h(lab)}</td>{tds}</tr>")
    tot = "".join(f"<td class='num'><b>{sum(int(v) for v in counts[c].values())}</b></td>"
                  for c in conds)
    head = "".join(f"<th>{_h(c)}</th>" for c in conds)
    return (f"<table class='sortable'><thead><tr><th>label</th>{head}</tr></thead><tbody>"
            f"{''.join(body)}</tbody><tfoot><tr><td><b>total</b></td>{tot}</tr></tfoot>"
            "</table>"), equal


def processing_html(manifest: dict[str, Any], trials: list[dict[str, Any]], *,
                    check_page: bool = False) -> str:
    """The processing report as one self-contained HTML page.

    Parameters
    ----------
    manifest : dict
        The build's manifest content (its ``outputs`` are not needed).
    trials : list of dict
        Rows of ``trials.tsv`` (numbers as numbers).
    check_page : bool
        Link ``check.html`` (the acoustic check beside this page).
    """
    rows = token_rows(manifest)
    recipe = manifest.get("recipe") or {}
    name = recipe.get("name", "build")
    retime = recipe.get("retime") or {}
    pitch = recipe.get("pitch") or {}
    loud = recipe.get("loudness") or recipe.get("level") or {}
    design = manifest.get("design") or {}
    sfac = [float(r["stretch_factor"]) for r in rows if r.get("stretch_factor") is not None]
    lim = _stretch_range(manifest)
    out_of = [r for r in rows if lim and r.get("stretch_factor") is not None
              and not lim[0] <= float(r["stretch_factor"]) <= lim[1]]
    flag_counts: dict[str, int] = {}
    for q in manifest.get("corpus_qc") or ():
        for f in q.get("flags") or ():
            flag_counts[f] = flag_counts.get(f, 0) + 1
    n_flagged = sum(1 for q in manifest.get("corpus_qc") or () if q.get("flags"))
    n_warn = sum(1 for r in rows if r.get("warnings"))
    bal_html, equal = _balance_table(design.get("label_counts") or {})
    lead_html, lead_equal = _balance_table(design.get("lead_in_label_counts") or {})
    uses = [int(v) for v in (design.get("token_counts") or {}).values()]
    target = manifest.get("pitch_target_hz")
    sd = [float(r["f0_sd_after_st"]) for r in rows if r.get("f0_sd_after_st") is not None
          and np.isfinite(float(r["f0_sd_after_st"]))]
    facts = [
        f"{len(rows)} tokens re-timed to the slot with {retime.get('backend', '?')}"
        + (f" (stretch factors {min(sfac):.3f}-{max(sfac):.3f}; allowed {lim[0]:g}-{lim[1]:g}"
           + (f", {len(out_of)} outside" if out_of else "") + ")" if sfac and lim else ""),
        f"pitch policy {pitch.get('policy', '?')}"
        + (f" at {float(target):.1f} Hz" if target else "")
        + (f" (F0 SD after, within a token: at most {max(sd):.2f} semitones)" if sd else ""),
        f"loudness {loud.get('target_dbfs', '?')} dBFS RMS over each token's active part"
        + (f"; whole set lowered {-float(manifest['set_gain_db']):.2f} dB by the peak guard"
           if float(manifest.get("set_gain_db") or 0.0) < 0 else ""),
        f"{n_flagged} of {len(manifest.get('corpus_qc') or ())} corpus tokens carry QC flags"
        + (" (" + ", ".join(f"{k.replace('_', ' ')} {v}" for k, v in sorted(flag_counts.items()))
           + ")" if flag_counts else "") + f"; {n_warn} processed token(s) with warnings",
        "labels in the analysed part: " + ("the same counts in every condition" if equal
                                           else "counts DIFFER across conditions")
        + ("; lead-in: the same" if lead_equal else "; lead-in: counts differ"),
        (f"token uses over the whole set: {min(uses)}-{max(uses)} per token" if uses else ""),
    ]
    # a column that says the same for every token goes into the facts above instead
    backends = {_f(r.get("backend"), "s") for r in rows}
    columns = [c for c in _TOKEN_COLUMNS
               if not (c[0] == "backend" and len(backends) < 2)
               and not (c[0] == "warnings" and not any(r.get("warnings") for r in rows))]
    head = "".join(f"<th>{_h(c)}</th>" for _, c, _ in columns)
    extra = sorted({k for r in rows for k in r} - {k for k, _, _ in _TOKEN_COLUMNS} - _HIDDEN)
    head += "".join(f"<th>{_h(k.replace('_', ' '))}</th>" for k in extra)
    body = []
    for r in rows:
        bad = bool(r["flags"] or r.get("warnings") or r in out_of)
        tds = []
        for key, _, fmt in columns:
            v = r.get(key)
            text = _f(v, fmt) if key != "flags" else ", ".join(f.replace("_", " ") for f in v)
            num = fmt != "s"
            dv = "" if v is None or not num else f" data-v='{float(v):.6g}'"
            tds.append(f"<td{' class=num' if num else ''}{dv}>{_h(text)}</td>")
        tds += [f"<td>{_h(_f(r.get(k), 's'))}</td>" for k in extra]
        body.append(f"<tr{' class=flag' if bad else ''}>{''.join(tds)}</tr>")
    lufs = {}
    for t in trials:
        if t.get("lufs") is not None:
            lufs.setdefault(t["stim_file"], (str(t.get("condition")), float(t["lufs"]),
                                             t.get("peak_dbfs")))
    lrows = []
    for c in dict.fromkeys(v[0] for v in lufs.values()):
        vals = [v[1] for v in lufs.values() if v[0] == c and np.isfinite(v[1])]
        peaks = [float(v[2]) for v in lufs.values() if v[0] == c and v[2] is not None]
        if vals:
            lrows.append(f"<tr><td>{_h(c)}</td><td class='num'>{len(vals)}</td><td class='num'>"
                         f"{min(vals):.2f}</td><td class='num'>{np.median(vals):.2f}</td>"
                         f"<td class='num'>{max(vals):.2f}</td><td class='num'>"
                         f"{max(peaks):.2f}</td></tr>" if peaks else "")
    nav = ["<span>stimforge processing report</span>", "<a href='#tokens'>tokens</a>",
           "<a href='#balance'>label balance</a>", "<a href='#trials'>trial loudness</a>"]
    if check_page:
        nav.append("<a href='check.html'>acoustic check</a>")
    parts = [
        f"<nav>{''.join(nav)}</nav>",
        f"<h1 class='verdict'>Processing of {_h(name)}</h1>",
        "<ul class='facts'>" + "".join(f"<li>{_h(x)}</li>" for x in facts if x) + "</ul>",
        f"<figure>{_figure(manifest, rows, trials)}<figcaption>Left to right: the stretch "
        "factor of every token (slot over token duration) with the allowed range; F0 and "
        "loudness after processing against before, one point per token (squares: a QC flag "
        "or a warning), with the target; each trial's integrated loudness by condition."
        "</figcaption></figure>",
        f"<section id='tokens'><h2>Tokens</h2><p>One row per token used; rows with a QC flag, a "
        f"warning or a stretch outside the allowed range are highlighted. Click a column to "
        f"sort.</p><table class='all sortable tok'><thead><tr>{head}</tr></thead><tbody>"
        f"{''.join(body)}</tbody></table></section>",
        "<section id='balance'><h2>Label balance</h2><p>How often each label is heard in the "
        "analysed part of the trials, per condition (every condition is built from the same "
        "tokens, so the counts should be equal; rows that differ are highlighted).</p>"
        + bal_html + "<details><summary>lead-in part</summary>" + lead_html + "</details>"
        "</section>",
        "<section id='trials'><h2>Trial loudness</h2><table><thead><tr><th>condition</th>"
        "<th>files</th><th>min (LUFS)</th><th>median (LUFS)</th><th>max (LUFS)</th>"
        "<th>highest peak (dBFS)</th></tr></thead><tbody>" + "".join(lrows)
        + "</tbody></table><p><em>Digital level is not sound pressure: calibrate the "
        "presentation level on the real transducer with a sound level meter.</em></p></section>",
    ]
    return ("<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
            "<meta name='viewport' content='width=device-width, initial-scale=1'>"
            f"<title>stimforge processing report: {_h(name)}</title><style>{PAGE_CSS}\n"
            "ul.facts{margin:4px 0 10px;padding-left:20px}\n"
            "table.tok{font-size:12.5px}table.tok td{white-space:nowrap}"
            "table.tok th{overflow-wrap:normal}</style></head><body><main>"
            + "".join(parts) + f"</main><script>{SORT_SCRIPT}</script></body></html>\n")


def write_processing_report(folder: str | Path, *, manifest: dict[str, Any] | None = None,
                            out: str | Path | None = None, check_page: bool | None = None) -> Path:
    """Write ``processing.html`` for a build folder.

    Parameters
    ----------
    folder : path
        The build folder (its ``trials.tsv`` is read; ``manifest.json`` too unless given).
    manifest : dict, optional
        The manifest content, when it is not written yet (the build passes it).
    out : path, optional
        Folder of the page (default: ``<folder>/check``).
    check_page : bool, optional
        Link ``check.html`` (default: when the manifest records a check).

    Returns
    -------
    Path of the page.

    Raises
    ------
    StimforgeError
        If the folder has no readable manifest or ``trials.tsv``.
    """
    root = Path(folder)
    if manifest is None:
        mpath = root / MANIFEST
        try:
            manifest = json.loads(mpath.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise StimforgeError(f"{mpath}: cannot read the manifest ({exc}); is {root} a "
                                 "finished stimforge build folder?") from None
    tpath = root / "trials.tsv"
    if not tpath.is_file():
        raise StimforgeError(f"{tpath}: missing; is {root} a finished stimforge build folder?")
    trials = [{k: _number(v) for k, v in r.items()} for r in read_tsv(tpath)]
    dest = Path(out) if out is not None else root / "check"
    dest.mkdir(parents=True, exist_ok=True)
    link = manifest.get("check") is not None if check_page is None else bool(check_page)
    page = dest / PAGE
    page.write_text(processing_html(manifest, trials, check_page=link), encoding="utf-8")
    return page
