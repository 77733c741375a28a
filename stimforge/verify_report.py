"""The acoustic check's report: verdict, terminal table, JSON layout and HTML page.

JSON layout (``schema_version`` 1; keys are stable, new keys may be added):

``schema_version`` (int), ``stimforge_version`` (str),
``verdict``: {``passed`` (bool), ``exit_code`` (0/1), ``summary`` (str), ``alpha``,
``correction`` ("holm"), ``family_size`` (int), ``significant`` (list of test descriptions)},
``design``: {``mode`` ("build" | "files"), ``source`` ("." for a build folder: the JSON lives in
it; the files as given otherwise), ``sample_rate``, ``unit``,
``unit_duration``, ``levels`` [{name, units_per_group, rate}], ``window``, ``resolution``,
``analysed_units``, ``env_sr``, ``conditions`` {name: n_trials}, ``files``, ``audio_seconds``},
``unit_rate``: [{condition, envelope, freq, ratio, itpc, p, clear}],
``spectral``: [{condition, envelope, level, freq, bin, harmonic, n_trials, measure ("evoked" |
"itpc" | "t2circ"), value (ratio | ITPC r | T2), stat (F | Rayleigh z | F), p, p_holm,
significant, snr_db (magnitude-average SNR, shown only), z and amplitude (evoked rows)}],
``features``: [{condition, level, feature, unit, test ("friedman"), stat, df, p, p_holm,
significant, value (Kendall's W), n_blocks, largest_difference (in ``unit``),
position_medians}],
``joins``: {``tests``: rows as in features (feature "join_step_db"), ``worst``: {score_db,
condition, file, trial, time (s from file start), unit_index}, ``flagged``: [same records],
``n_flagged``, ``n_boundaries``, ``threshold_db``, ``median_db``},
``sensitivity``: null or [{cue ("level_step" | "gap" | "pitch_step"), level, where ("first" |
"last"), unit, smallest_detected (null: not found up to largest_tried; with at_floor true the
first size tried was already revealed, so the set may reveal smaller ones), largest_missed,
largest_tried, detected_by, envelope_only (smallest size the spectral tests alone reveal; null
for the pitch step, which is planted in F0 only), envelope_only_at_floor, evaluations,
seconds}],
``warnings``: [str].  Only with ``to_dict(timings=True)`` / ``write_json(..., timings=True)``
(the CLI's ``--json``): ``timings``: {measure, tests, sensitivity, total} (s) and ``seconds`` per
sensitivity row; they are left out by default so that the same audio gives a byte-identical
report (a build is reproducible to the byte).  Non-finite numbers are written as null.
"""

from __future__ import annotations

import base64
import html
import io
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .acoustics import FEATURE_LABEL, FEATURES
from .audio_io import json_dumps, to_jsonable

__all__ = ["CheckReport", "SCHEMA_VERSION", "CAUTION"]

SCHEMA_VERSION = 1

CAUTION = (
    "The check vouches for the acoustics only: it cannot rule out prosody that listeners "
    "impose on neutral audio, nor cues it does not measure (e.g. co-articulation or vowel "
    "quality by position beyond the spectral centroid)."
)

_FEATURE_TEXT = {
    "rms_db": "level", "active_ms": "active duration", "f0_st": "median F0",
    "centroid_hz": "spectral centroid", "rise_ms": "steepest-rise latency",
    "join_step_db": "join step",
}


# Half of the smallest y-span of the per-position plots, per feature (in its unit).
_MIN_HALF_SPAN = {"rms_db": 0.5, "active_ms": 5.0, "f0_st": 0.5, "centroid_hz": 50.0,
                  "rise_ms": 5.0}


def _fmt_p(p: float) -> str:
    if p is None or not np.isfinite(p):
        return "n/a"
    return f"{p:.2g}" if p >= 1e-4 else f"{p:.1e}"


def _describe(r: dict) -> str:
    if r["measure"] in ("feature", "joins"):
        return (f"{r['condition']}: {_FEATURE_TEXT.get(r['feature'], r['feature'])} by position "
                f"in the {r['level']} (largest difference {r['largest_difference']:.3g} "
                f"{r['unit']}, p_holm {_fmt_p(r['p_holm'])})")
    return (f"{r['condition']}: {r['envelope']} envelope, {r['measure']} at {r['freq']:g} Hz "
            f"({r['level']}, p_holm {_fmt_p(r['p_holm'])})")


@dataclass(frozen=True, repr=False)
class CheckReport:
    """Result of the acoustic check.  ``passed`` is True when no test of the family is
    significant after Holm correction at ``alpha``."""

    alpha: float
    design: dict
    unit_rate: tuple
    spectral: tuple
    features: tuple
    joins: tuple
    join_summary: dict
    sensitivity: tuple | None
    warnings: tuple
    timings: dict
    location: str = field(default="", compare=False)  # where the set was read (display only)
    _plots: dict = field(default_factory=dict, compare=False)

    # -- verdict ---------------------------------------------------------------------------
    @property
    def family(self) -> list[dict]:
        return list(self.spectral) + list(self.features) + list(self.joins)

    @property
    def significant(self) -> list[dict]:
        return sorted((r for r in self.family if r["significant"]), key=lambda r: r["p_holm"])

    @property
    def passed(self) -> bool:
        return not self.significant

    @property
    def exit_code(self) -> int:
        return 0 if self.passed else 1

    def sensitivity_sentence(self) -> str:
        if not self.sensitivity:
            return "sensitivity not estimated"
        if not self.passed:
            return ("the planted-cue sensitivity is not a statement about hidden cues here, "
                    "since the set already shows one (sizes are in the JSON)")
        parts = []
        for s in self.sensitivity:
            pos = "initial" if s["where"] == "first" else "final"
            if s["smallest_detected"] is None:
                size = f"(none up to {s['largest_tried']:g} {s['unit']} was revealed)"
            elif s.get("at_floor"):
                size = f"of {s['smallest_detected']:g} {s['unit']} or less (the smallest tried)"
            else:
                size = f"of >= {s['smallest_detected']:.2g} {s['unit']}"
            if s["cue"] == "level_step":
                txt = f"a {s['level']}-{pos} level step {size}"
            elif s["cue"] == "gap":
                txt = f"a silent gap {size} before each {s['level']} boundary"
            else:
                txt = f"a {s['level']}-{pos} pitch step {size}"
            parts.append(txt)
        env = [f"{s['envelope_only']:.2g} {s['unit']}" + (" or less" if s.get("envelope_only_at_floor") else "")
               + (f" ({s['level']} level step)" if s["cue"] == "level_step" else f" ({s['level']} gap)")
               for s in self.sensitivity if s.get("envelope_only") is not None]
        tail = f"; the envelope tests alone: {', '.join(env)}" if env else ""
        return "this set would have shown " + ", ".join(parts) + tail

    def summary_line(self) -> str:
        n = len(self.family)
        conds = ", ".join(f"{c} ({k} trials)" for c, k in self.design["conditions"].items())
        if self.passed:
            head = (f"No acoustic cue at the structure's rates: 0 of {n} tests significant "
                    f"(Holm, alpha {self.alpha:g}; {conds})")
        else:
            sig = self.significant
            head = (f"Acoustic cue found: {len(sig)} of {n} tests significant (Holm, alpha "
                    f"{self.alpha:g}); strongest: {_describe(sig[0])}")
        js = self.join_summary
        clicks = ""
        if js.get("n_flagged"):
            w = js["worst"]
            clicks = (f"; {js['n_flagged']} join(s) with a click-like step, worst in {w['file']} "
                      f"at {w['time']:.3f} s")
        return head + "; " + self.sensitivity_sentence() + clicks + "."

    # -- terminal table --------------------------------------------------------------------
    def format_table(self, *, show_location: bool = True) -> str:
        """The terminal table; ``show_location=False`` names the source as recorded in the JSON."""
        lines = []
        d = self.design
        rates = ", ".join(f"{lv['name']} {lv['rate']:g} Hz" for lv in d["levels"])
        where = (self.location or d["source"]) if show_location else d["source"]
        if where == "." and d["mode"] == "build":
            where = "this build folder"
        lines.append(f"acoustic check of {where} ({d['mode']}): {rates}; window "
                     f"{d['window']:g} s, resolution {d['resolution']:.4g} Hz")
        hdr = f"{'condition':<12}{'level':<10}{'rate (Hz)':>10}  {'measure':<32}{'value':>10}{'p':>10}{'p_holm':>10}  verdict"
        lines.append(hdr)
        lines.append("-" * len(hdr))
        for u in self.unit_rate:
            lines.append(f"{u['condition'][:11]:<12}{d['unit'][:9]:<10}{u['freq']:>10.4g}  "
                         f"{(u['envelope'] + ' unit-rate peak')[:31]:<32}{u['ratio']:>10.3g}"
                         f"{_fmt_p(u['p']):>10}{'':>10}  {'ok' if u['clear'] else 'NO PEAK'}")
        hidden = 0
        for r in self.spectral:
            if r["harmonic"] != 1 and not r["significant"]:
                hidden += 1
                continue
            name = {"evoked": "evoked/neighbours", "itpc": "ITPC (Rayleigh)",
                    "t2circ": "T2circ"}[r["measure"]]
            lines.append(self._row(r, f"{r['envelope']} {name}", r["value"], r["freq"]))
            if r["measure"] == "t2circ" and r["harmonic"] == 1:
                snr = r.get("snr_db")
                v = "n/a" if snr is None or not np.isfinite(snr) else f"{snr:.2f} dB"
                lines.append(f"{r['condition'][:11]:<12}{r['level'][:9]:<10}{r['freq']:>10.4g}  "
                             f"{(r['envelope'] + ' magnitude SNR')[:31]:<32}{v:>10}"
                             f"{'':>10}{'':>10}  (shown only)")
        for r in list(self.features) + list(self.joins):
            name = f"{_FEATURE_TEXT.get(r['feature'], r['feature'])} by position"
            lv = next(x for x in d["levels"] if x["name"] == r["level"])
            lines.append(self._row(r, name, r["largest_difference"], lv["rate"],
                                   suffix=f" {r['unit']}"))
        if hidden:
            lines.append(f"({hidden} harmonic tests not shown: none significant; all in the JSON)")
        js = self.join_summary
        if js.get("worst"):
            w = js["worst"]
            lines.append(f"worst join: {w['file']} (trial {w['trial']}, {w['condition']}) at "
                         f"{w['time']:.4f} s, step {w['score_db']:+.1f} dB re the units' own; "
                         f"{js['n_flagged']} of {js['n_boundaries']} joins above "
                         f"{js['threshold_db']:+.0f} dB")
        if self.sensitivity:
            lines.append("sensitivity (planted cues, same tests): " + self.sensitivity_sentence())
        for w in self.warnings:
            lines.append(f"warning: {w}")
        lines.append(f"verdict: {'PASS' if self.passed else 'CUE FOUND'} (exit {self.exit_code})")
        return "\n".join(lines)

    @staticmethod
    def _row(r: dict, name: str, value: float, rate: float, suffix: str = "") -> str:
        v = "n/a" if value is None or not np.isfinite(value) else f"{value:.3g}"
        return (f"{r['condition'][:11]:<12}{r['level'][:9]:<10}{rate:>10.4g}  {name[:31]:<32}"
                f"{(v + suffix):>10}{_fmt_p(r['p']):>10}{_fmt_p(r['p_holm']):>10}  "
                f"{'CUE' if r['significant'] else 'ok'}")

    # -- JSON ------------------------------------------------------------------------------
    def to_dict(self, *, timings: bool = False) -> dict:
        """The JSON layout (module docstring); wall-clock times only with ``timings=True``."""
        from ._version import __version__

        sens = None
        if self.sensitivity is not None:
            sens = [s if timings else {k: v for k, v in s.items() if k != "seconds"}
                    for s in self.sensitivity]

        return to_jsonable({
            "schema_version": SCHEMA_VERSION,
            "stimforge_version": __version__,
            "verdict": {"passed": self.passed, "exit_code": self.exit_code,
                        "summary": self.summary_line(), "alpha": self.alpha,
                        "correction": "holm", "family_size": len(self.family),
                        "significant": [_describe(r) for r in self.significant],
                        "caution": CAUTION},
            "design": self.design,
            "unit_rate": list(self.unit_rate),
            "spectral": list(self.spectral),
            "features": list(self.features),
            "joins": {"tests": list(self.joins), **self.join_summary},
            "sensitivity": sens,
            "warnings": list(self.warnings),
            **({"timings": self.timings} if timings else {}),
        })

    def write_json(self, path: str | Path, *, timings: bool = False) -> Path:
        """Write :meth:`to_dict` as JSON (byte-identical for the same audio unless ``timings``)."""
        p = Path(path)
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_text(json_dumps(self.to_dict(timings=timings), sort_keys=False),
                     encoding="utf-8")
        return p

    # -- HTML ------------------------------------------------------------------------------
    def write_html(self, directory: str | Path) -> Path:
        """Write ``check.html`` (self-contained: figures embedded as base64 PNG) into a folder."""
        out = Path(directory)
        out.mkdir(parents=True, exist_ok=True)
        p = out / "check.html"
        p.write_text(self._html(figures=True), encoding="utf-8")
        return p

    def _repr_html_(self) -> str:
        return self._html(figures=False, full=False)

    def __repr__(self) -> str:
        n = len(self.family)
        return (f"CheckReport(passed={self.passed}, significant={len(self.significant)}/{n}, "
                f"alpha={self.alpha:g}, conditions={self.design['conditions']})")

    def _figures(self) -> list[tuple[str, str]]:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt

        figs = []
        d = self.design
        rates = [lv["rate"] for lv in d["levels"]]
        spectra = self._plots.get("spectra", {})

        def emit(fig, caption):
            buf = io.BytesIO()
            fig.savefig(buf, format="png", dpi=90, bbox_inches="tight",
                        metadata={"Software": None})  # no version stamp: reproducible bytes
            plt.close(fig)
            figs.append((caption, base64.b64encode(buf.getvalue()).decode("ascii")))

        if spectra:
            conds = sorted({c for c, _ in spectra})
            fig, axes = plt.subplots(2, len(conds), figsize=(5 * len(conds), 6), squeeze=False,
                                     constrained_layout=True)
            for j, c in enumerate(conds):
                for kind, ls in (("broadband", "-"), ("auditory", "--")):
                    s = spectra.get((c, kind))
                    if s is None:
                        continue
                    f = s["freq"]
                    ev = s["evoked"] / max(np.max(s["evoked"][1:]), 1e-20)
                    mm = s["mean_mag"] / max(np.max(s["mean_mag"][1:]), 1e-20)
                    axes[0, j].plot(f[1:], ev[1:], ls, label=f"{kind} evoked")
                    axes[0, j].plot(f[1:], mm[1:], ls, alpha=0.4, label=f"{kind} mean |X|")
                    axes[1, j].plot(f[1:], s["itpc"][1:], ls, label=kind)
                for ax in axes[:, j]:
                    for r in rates:
                        ax.axvline(r, color="0.6", lw=0.8, ls=":")
                axes[0, j].set_title(f"{c}: envelope spectra (rates dotted)")
                axes[0, j].set_ylabel("relative amplitude")
                axes[1, j].set_ylabel("ITPC")
                axes[1, j].set_xlabel("frequency (Hz)")
                axes[0, j].legend(fontsize=7)
                axes[1, j].legend(fontsize=7)
            emit(fig, "Envelope spectra (evoked = complex mean over trials) and inter-trial "
                      "phase coherence; dotted lines mark the structure's rates.")
        feats = self._plots.get("features", {})
        if feats:

            conds = sorted(feats)
            levels = d["levels"][1:]
            fig, axes = plt.subplots(len(FEATURES), len(levels), squeeze=False,
                                     figsize=(4 * len(levels), 2.2 * len(FEATURES)),
                                     constrained_layout=True)
            for li, lv in enumerate(levels):
                per = lv["units_per_group"]
                below = d["levels"][li]["units_per_group"]
                for fi, (fname, unit) in enumerate(FEATURES):
                    ax = axes[fi, li]
                    for c in conds:
                        F = feats[c][:, :, fi]
                        pos = (np.arange(F.shape[1]) % per) // below
                        med = [np.nanmedian(F[:, pos == q]) if np.any(np.isfinite(F[:, pos == q]))
                               else np.nan for q in range(per // below)]
                        ax.plot(np.arange(1, len(med) + 1), med, "o-", label=c)
                    ax.set_title(f"{FEATURE_LABEL[fname]} by position in {lv['name']}", fontsize=8)
                    # never zoom in past a span a listener could care about: a 0.01 dB spread
                    # drawn full height looks like a cue and is not one
                    lo, hi = ax.get_ylim()
                    half = max((hi - lo) / 2, _MIN_HALF_SPAN[fname])
                    mid = (lo + hi) / 2
                    ax.set_ylim(mid - half, mid + half)
                    ax.set_xticks(np.arange(1, per // below + 1))
                    ax.ticklabel_format(axis="y", useOffset=False)
                    ax.set_ylabel(unit, fontsize=8)
                    ax.tick_params(labelsize=7)
                axes[0, li].legend(fontsize=7)
            emit(fig, "Per-position features: median over units at each position of the "
                      "level (F0 in semitones re 100 Hz). Each panel spans at least 1 dB, 10 ms, "
                      "1 semitone or 100 Hz, so that differences too small to matter look flat.")
        joins = self._plots.get("joins", {})
        if joins:
            fig, ax = plt.subplots(figsize=(7, 3))
            for c, J in sorted(joins.items()):
                v = J[np.isfinite(J)]
                if v.size:
                    ax.hist(v, bins=40, alpha=0.5, label=c)
            ax.axvline(self.join_summary.get("threshold_db", 0.0), color="r", ls=":")
            ax.set_xlabel("largest step within 2 ms of a boundary, dB re the units' own")
            ax.set_ylabel("joins")
            ax.legend(fontsize=7)
            emit(fig, "Joins: boundaries to the right of the red line are flagged as clicks.")
        return figs

    def _html(self, *, figures: bool, full: bool = True) -> str:
        e = html.escape
        verdict = "PASS: no cue found" if self.passed else "CUE FOUND"
        colour = "#1a7f37" if self.passed else "#cf222e"
        parts = [f"<h2 style='color:{colour}'>{e(verdict)}</h2>",
                 f"<p>{e(self.summary_line())}</p>", f"<p><em>{e(CAUTION)}</em></p>"]
        rows = "".join(
            f"<tr><td>{e(r['condition'])}</td><td>{e(r['level'])}</td>"
            f"<td>{e(_describe(r))}</td><td>{_fmt_p(r['p'])}</td><td>{_fmt_p(r['p_holm'])}</td>"
            f"<td>{'CUE' if r['significant'] else 'ok'}</td></tr>"
            for r in sorted(self.family, key=lambda r: r["p"])[: (None if full else 10)])
        parts.append("<table border='1' cellspacing='0' cellpadding='3'><tr><th>condition</th>"
                     "<th>level</th><th>test</th><th>p</th><th>p (Holm)</th><th>verdict</th></tr>"
                     + rows + "</table>")
        if not full:
            return "<div>" + "".join(parts) + "</div>"
        if self.sensitivity:
            srows = "".join(
                f"<tr><td>{e(s['cue'])}</td><td>{e(s['level'])} ({e(s['where'])})</td>"
                f"<td>{'not found' if s['smallest_detected'] is None else format(s['smallest_detected'], '.3g')}"
                f" {e(s['unit'])}</td><td>{e('; '.join(s['detected_by']))}</td>"
                f"<td>{s['evaluations']}</td></tr>" for s in self.sensitivity)
            parts.append("<h3>Sensitivity</h3><p>Cues planted into copies of the set (envelope "
                         "and feature domains), tested by the same family.</p><table border='1' "
                         "cellspacing='0' cellpadding='3'><tr><th>cue</th><th>where</th>"
                         "<th>smallest revealed</th><th>found by</th><th>runs</th></tr>"
                         + srows + "</table>")
        js = self.join_summary
        if js.get("worst"):
            w = js["worst"]
            parts.append(f"<h3>Joins</h3><p>Worst join: {e(w['file'])} (trial {e(str(w['trial']))})"
                         f" at {w['time']:.4f} s, {w['score_db']:+.1f} dB; {js['n_flagged']} of "
                         f"{js['n_boundaries']} joins flagged.</p>")
        if figures:
            for cap, b64 in self._figures():
                parts.append(f"<figure><img src='data:image/png;base64,{b64}'/>"
                             f"<figcaption>{e(cap)}</figcaption></figure>")
        parts.append("<h3>What this check can and cannot vouch for</h3><p>It measures the audio: "
                     "envelope energy and phase locking at the structure's rates, and level, "
                     "duration, pitch, spectral centroid and onset sharpness by position. A pass "
                     "means none of these differs by position beyond what chance allows at the "
                     "stated alpha, and the sensitivity table says how large a cue could hide. It "
                     "cannot vouch for what listeners impose on neutral audio (imagined prosody, "
                     "lexical knowledge), nor for cues it does not measure.</p>")
        parts.append("<h3>Table</h3><pre>" + e(self.format_table(show_location=False)) + "</pre>")
        return ("<!DOCTYPE html><html><head><meta charset='utf-8'><title>stimforge acoustic "
                "check</title></head><body style='font-family:sans-serif;max-width:1100px'>"
                + "".join(parts) + "</body></html>")
