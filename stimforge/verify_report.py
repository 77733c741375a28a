"""The acoustic check's report: verdict, terminal table, JSON layout and HTML page.

JSON layout (``schema_version`` 2; keys are stable, new keys may be added):

``schema_version`` (int), ``stimforge_version`` (str),
``verdict``: {``passed`` (bool: no cue found), ``state`` ("pass" | "cue" | "inconclusive"),
``exit_code`` (0 pass / 1 cue / 3 inconclusive), ``vouched`` (bool: every reference cue would
have been revealed at every level), ``limits`` ([{cue, level, where, unit, reference,
smallest_detected, largest_tried, on ("intact" | "all")}]: the reference cues it could not
vouch for), ``reference`` ({level_step (dB), gap (ms), pitch_step (semitones)}), ``summary``
(str), ``alpha``, ``correction`` ("holm"), ``family_size`` (int), ``significant`` (list of test
descriptions)},
``design``: {``mode`` ("build" | "files"), ``source`` ("." for a build folder: the JSON lives in
it; the files as given otherwise), ``sample_rate``, ``unit``,
``unit_duration``, ``levels`` [{name, units_per_group, rate}], ``window``, ``resolution``,
``analysed_units``, ``env_sr``, ``conditions`` {name: n_trials}, ``files``, ``audio_seconds``;
plain files also ``offset`` (s) and ``offset_auto`` (bool)},
``grid_fit``: {lead_silence, tail_silence (median s of silence at the window's ends),
boundary_db, quietest_db (median dB re the slots' mean at the slot boundaries / in the quietest
10 ms of a slot)},
``unit_rate``: [{condition, envelope, freq, ratio, itpc, p, clear}],
``spectral``: [{condition, envelope, level, freq, bin, harmonic, n_trials, measure ("evoked" |
"itpc" | "t2circ"), value (ratio | ITPC r | T2), stat (F | Rayleigh z | F), p, p_holm,
significant, snr_db (magnitude-average SNR, shown only), z and amplitude (evoked rows)}],
``features``: [{condition, level, feature, unit, test ("friedman"), stat, df, p, p_holm,
significant, value (Kendall's W), n_blocks, largest_difference (in ``unit``, between the
position medians), position_medians, position_means; ``breakdown`` on significant rows, see
below}],
``boundary``: [{condition, level, feature (as in features, or "join_step_db"), unit, measure
("boundary"), where ("first" | "last"), test ("aligned_rank"), stat (z), p, p_holm, significant,
value (median over blocks of the boundary unit minus the mean of its compared units, in
``unit``), effect ("median_difference"), mean_difference, n_blocks, compared_units,
target_median, others_median, largest_difference (abs(value)), ``breakdown`` on significant
rows}],
``breakdown`` (significant feature, boundary and join rows): {flagged_units (str), feature, unit,
flagged {n, median, mean}, compared {n, median, mean}, difference (medians), mean_difference,
by_label, by_token, by_file ([{name, n_flagged, median_flagged, mean_flagged, n_elsewhere,
median_elsewhere, mean_elsewhere, share, contribution}], top 5), only_here_share,
same_label_difference, same_token_difference (means), nested ([{level, n_at, mean_at, n_not,
mean_not}]), sits_at (the higher level whose boundary carries the difference, or null), driver
("material" | "rendering" | "composition" | "compared" | "unknown"), explanation, setting (the recipe setting
that addresses it, or null)},
``joins``: {``tests``: rows as in features (feature "join_step_db"), ``worst``: {score_db,
condition, file, trial, time (s from file start), unit_index}, ``flagged``: [same records],
``n_flagged``, ``n_boundaries``, ``threshold_db``, ``median_db``},
``sensitivity``: null or [{cue ("level_step" | "gap" | "pitch_step"), level, where ("first" |
"last"), unit, smallest_detected (null: not found up to largest_tried; with at_floor true the
first size tried was already revealed, so the set may reveal smaller ones), largest_missed,
largest_tried, detected_by, detected_in (the conditions whose tests revealed the smallest size),
envelope_only (smallest size the spectral tests alone reveal; null for the pitch step, which is
planted in F0 only), envelope_only_at_floor, intact (null, or the same figures with the cue
planted in the intact condition(s) only: {conditions, smallest_detected, largest_missed,
at_floor, detected_by, detected_in}), reference (the reference size), vouch_on ("intact" |
"all": the figure the verdict uses), reference_detected (bool), evaluations, seconds}],
``warnings``: [str].  Only with ``to_dict(timings=True)`` / ``write_json(..., timings=True)``
(the CLI's ``--json``): ``timings``: {measure, tests, sensitivity, total (s), jobs} and ``seconds`` per
sensitivity row; they are left out by default so that the same audio gives a byte-identical
report (a build is reproducible to the byte).  Non-finite numbers are written as null.
"""

from __future__ import annotations

import base64
import html
import io
import os
import re
import sys
from dataclasses import MISSING, dataclass, field, fields
from pathlib import Path

import numpy as np

from .acoustics import FEATURES
from .audio_io import json_dumps, to_jsonable
from .errors import CheckInputError

__all__ = ["CheckReport", "SCHEMA_VERSION", "CAUTION", "new_figure",
           "figure_png", "figure_img", "plain", "PAGE_CSS", "SORT_SCRIPT"]

SCHEMA_VERSION = 2

CAUTION = (
    "The check vouches for the acoustics only: it cannot rule out prosody that listeners "
    "impose on neutral audio, nor cues it does not measure (e.g. co-articulation or vowel "
    "quality by position beyond the spectral centroid)."
)

# --------------------------------------------------------------------------- words
# One word per idea, in the terminal, the page and the JSON descriptions alike.  The JSON keys
# stay as they are (``rms_db``, ``itpc`` ...); these are what a reader sees.
FEATURE_WORDS = {
    "rms_db": "loudness", "active_ms": "active duration", "f0_st": "pitch",
    "centroid_hz": "spectral centroid", "rise_ms": "steepest-rise latency",
    "join_step_db": "join step",
}
#: Units as a reader sees them, by the unit string of a row.
UNIT_WORDS = {"dB": "dB", "ms": "ms", "st": "semitones", "Hz": "Hz"}
#: Axis labels of the per-position features.
FEATURE_AXIS = {
    "rms_db": "loudness (dB RMS)", "active_ms": "active duration (ms)",
    "f0_st": "pitch (semitones re 100 Hz)", "centroid_hz": "spectral centroid (Hz)",
    "rise_ms": "steepest-rise latency (ms)", "join_step_db": "join step (dB)",
}
MEASURE_WORDS = {"evoked": "evoked amplitude", "itpc": "ITPC", "t2circ": "T2circ"}
CUE_WORDS = {"level_step": "loudness step", "gap": "silent gap", "pitch_step": "pitch step"}
#: The three states of the verdict: (label, meaning); exit 0 / 1 / 3.
VERDICT_STATES = {"pass": ("PASS", "no acoustic cue found"),
                  "cue": ("CUE FOUND", "acoustic cue found"),
                  "inconclusive": ("INCONCLUSIVE", "no cue found, but the set cannot vouch for "
                                   "every reference cue")}
EXIT_CODES = {"pass": 0, "cue": 1, "inconclusive": 3}

_INTERNAL = re.compile(r"\b(" + "|".join(
    sorted([*FEATURE_WORDS, *MEASURE_WORDS, *CUE_WORDS], key=len, reverse=True)) + r")\b")


def plain(text: str) -> str:
    """A description from the checker with its internal names replaced by the words above."""
    words = {**FEATURE_WORDS, **MEASURE_WORDS, **CUE_WORDS}
    out = _INTERNAL.sub(lambda m: words[m.group(1)], str(text))
    return re.sub(r"by position in (?!the )(\w)", r"by position in the \1", out)


# Half of the smallest y-span of the per-position plots, per feature (in its unit).
_MIN_HALF_SPAN = {"rms_db": 0.5, "active_ms": 5.0, "f0_st": 0.5, "centroid_hz": 50.0,
                  "rise_ms": 5.0, "join_step_db": 0.5}


def _fmt_p(p: float) -> str:
    if p is None or not np.isfinite(p):
        return "n/a"
    return f"{p:.2g}" if p >= 1e-4 else f"{p:.1e}"


def _num(v, fmt: str = ".3g") -> str:
    if v is None or (isinstance(v, float) and not np.isfinite(v)):
        return "n/a"
    return format(v, fmt)


def _is_feature(r: dict) -> bool:
    return r.get("measure") in ("feature", "joins") or "feature" in r


def _test_name(r: dict) -> str:
    """What a row tests, in plain words, without its condition."""
    if r.get("measure") == "boundary":
        f = r.get("feature", "")
        return (f"{FEATURE_WORDS.get(f, plain(f))} of each {r.get('level', '?')}'s "
                f"{r.get('where', '?')} unit")
    if _is_feature(r):
        f = r.get("feature", "")
        return f"{FEATURE_WORDS.get(f, plain(f))} by position in the {r.get('level', '?')}"
    m = r.get("measure", "")
    env = r.get("envelope")
    name = MEASURE_WORDS.get(m, plain(m))
    return f"{env} envelope, {name}" if env else name


def _size_text(r: dict) -> str:
    """A row's effect size with its unit (never a bare number)."""
    m = r.get("measure")
    if m == "boundary":
        unit = UNIT_WORDS.get(r.get("unit", ""), r.get("unit", ""))
        v, mv = r.get("value"), r.get("mean_difference")
        txt = f"{'n/a' if v is None or not np.isfinite(v) else format(v, '+.3g')} {unit}"
        if v is not None and mv is not None and np.isfinite(mv) and abs(mv) > 2 * abs(v):
            txt += f" (mean {mv:+.3g})"  # a cue on some of the blocks only
        return txt + " re the compared units"
    if _is_feature(r) and r.get("position_means"):
        unit = UNIT_WORDS.get(r.get("unit", ""), r.get("unit", ""))
        spread = r.get("largest_difference")
        means = [v for v in r["position_means"] if v is not None and np.isfinite(v)]
        txt = f"spread {_num(spread)} {unit}".rstrip()
        if means and spread is not None and np.isfinite(spread) and \
                max(means) - min(means) > 2 * abs(spread):
            txt += f" (of the means {max(means) - min(means):.3g})"
        return txt
    if _is_feature(r):
        unit = UNIT_WORDS.get(r.get("unit", ""), r.get("unit", ""))
        return f"spread {_num(r.get('largest_difference'))} {unit}".rstrip()
    if m == "evoked":
        F = r.get("stat")
        if F is None or not np.isfinite(F) or F <= 0:
            return f"ratio {_num(r.get('value'))} re neighbours"
        return f"{10 * np.log10(F):+.1f} dB re neighbours"
    if m == "itpc":
        return f"r {_num(r.get('value'), '.2f')}"
    if m == "t2circ":
        return f"T2 {_num(r.get('value'), '.2f')}"
    unit = r.get("unit", "")
    return f"{_num(r.get('value'))} {unit}".rstrip()


def _rate_of(r: dict, design: dict) -> float | None:
    if r.get("freq") is not None:
        return r["freq"]
    lv = next((x for x in design.get("levels", []) if x["name"] == r.get("level")), None)
    return None if lv is None else lv["rate"]


def _describe(r: dict) -> str:
    """One test in plain words (the JSON's ``verdict.significant`` and the summary)."""
    where = f"{r['condition']}: " if r.get("condition") is not None else ""
    if _is_feature(r):
        return (f"{where}{_test_name(r)} ({_size_text(r)}, p_holm {_fmt_p(r.get('p_holm'))})")
    at = f" at {r['freq']:g} Hz" if r.get("freq") is not None else ""
    lv = f"{r['level']} rate, " if r.get("level") else ""
    return f"{where}{_test_name(r)}{at} ({lv}p_holm {_fmt_p(r.get('p_holm'))})"


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
    boundary: tuple = ()  # boundary contrasts (in the family)
    reference: dict = field(default_factory=dict)  # reference cue sizes
    limits: tuple = ()  # reference cues the set cannot vouch for
    grid_fit: dict = field(default_factory=dict)
    location: str = field(default="", compare=False)  # where the set was read (display only)
    _plots: dict = field(default_factory=dict, compare=False)

    # -- verdict ---------------------------------------------------------------------------
    @property
    def family(self) -> list[dict]:
        return list(self.spectral) + list(self.features) + list(self.boundary) + list(self.joins)

    @property
    def significant(self) -> list[dict]:
        return sorted((r for r in self.family if r["significant"]), key=lambda r: r["p_holm"])

    @property
    def passed(self) -> bool:
        return not self.significant

    @property
    def state(self) -> str:
        """``"cue"`` (a test is significant), ``"inconclusive"`` (none is, but the set could
        not have revealed a reference cue at some level: :attr:`limits`) or ``"pass"``."""
        if not self.passed:
            return "cue"
        return "inconclusive" if self.limits else "pass"

    @property
    def vouched(self) -> bool:
        """True when the sensitivity was estimated and every reference cue would have shown."""
        return self.sensitivity is not None and not self.limits

    @property
    def exit_code(self) -> int:
        """0 pass, 1 cue found, 3 inconclusive (``stimforge check --strict`` makes 3 a 1)."""
        return EXIT_CODES[self.state]

    @property
    def verdict(self) -> str:
        """``"PASS"``, ``"CUE FOUND"`` or ``"INCONCLUSIVE"``: worded one way everywhere."""
        return VERDICT_STATES[self.state][0]

    @property
    def verdict_meaning(self) -> str:
        return VERDICT_STATES[self.state][1]

    def limits_sentence(self) -> str:
        """What the set cannot vouch for, e.g. "this set cannot vouch for sentence-final pitch
        steps below 2.5 semitones (reference 1)"; empty when it vouches for everything."""
        parts = []
        for m in self.limits:
            unit = UNIT_WORDS.get(m.get("unit", ""), m.get("unit", ""))
            pos = "initial" if m.get("where") == "first" else "final"
            what = {"level_step": f"{m['level']}-{pos} loudness steps",
                    "gap": f"silent gaps closing each {m['level']}",
                    "pitch_step": f"{m['level']}-{pos} pitch steps"}.get(m["cue"], m["cue"])
            v = m.get("smallest_detected")
            size = (f"below {v:.2g} {unit}" if v is not None else
                    f"of any size up to {m.get('largest_tried', 0):g} {unit}")
            parts.append(f"{what} {size} (reference {m['reference']:g})")
        if not parts:
            return ""
        on = " (cue planted in the intact condition)" if any(
            m.get("on") == "intact" for m in self.limits) else ""
        return "this set cannot vouch for " + ", ".join(parts) + on

    def sensitivity_sentence(self) -> str:
        """The planted-cue sensitivity in one clause: per cue, the largest size over the levels
        (the per-level sizes are in :meth:`format_text` and the HTML page)."""
        if not self.sensitivity:
            return "sensitivity not estimated"
        if not self.passed:
            return ("the planted-cue sensitivity is not a statement about hidden cues here, "
                    "since the set already shows one")
        by_cue: dict[str, list[dict]] = {}
        for s in self.sensitivity:
            by_cue.setdefault(s["cue"], []).append(s)
        parts = [f"a {CUE_WORDS.get(c, plain(c))} of {_cue_size(_weakest(rows))}"
                 for c, rows in by_cue.items()]
        levels = list(dict.fromkeys(s["level"] for s in self.sensitivity))
        return ("this set would have shown " + ", ".join(parts) + " at every "
                + "/".join(levels) + " boundary")

    def summary_line(self) -> str:
        """The verdict in one plain paragraph (the JSON's ``verdict.summary``)."""
        head = _verdict_sentence(self)
        js = self.join_summary
        clicks = ""
        if js.get("n_flagged"):
            w = js["worst"]
            clicks = (f"; {js['n_flagged']} join(s) with a click-like step, worst in {w['file']} "
                      f"at {w['time']:.3f} s")
        return head + "; " + self.sensitivity_sentence() + clicks + "."

    # -- terminal --------------------------------------------------------------------------
    def format_text(self, *, table: bool = False, show_location: bool = True,
                    top: int = 5) -> str:
        """The terminal report: the verdict first, then the tests that matter, the unit-rate
        peak, the sensitivity per level, the joins and any warnings; with ``table=True`` every
        test of the family follows (``stimforge check --table``).  Names are never cut short
        and every value carries its unit.

        Parameters
        ----------
        table : bool
            Append the full table (smallest p first).
        show_location : bool
            Name the folder as read (False: as recorded in the JSON).
        top : int
            Tests shown when none is significant (the smallest p-values).
        """
        return _text(self, table=table, show_location=show_location, top=top)

    def format_table(self, *, show_location: bool = True) -> str:
        """:meth:`format_text` with the full table of every test."""
        return _text(self, table=True, show_location=show_location)

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
            "verdict": {"passed": self.passed, "state": self.state,
                        "exit_code": self.exit_code, "vouched": self.vouched,
                        "limits": list(self.limits), "reference": dict(self.reference),
                        "summary": self.summary_line(), "alpha": self.alpha,
                        "correction": "holm", "family_size": len(self.family),
                        "significant": [_describe(r) for r in self.significant],
                        "caution": CAUTION},
            "design": self.design,
            "unit_rate": list(self.unit_rate),
            "spectral": list(self.spectral),
            "features": list(self.features),
            "boundary": list(self.boundary),
            "joins": {"tests": list(self.joins), **self.join_summary},
            "grid_fit": dict(self.grid_fit),
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

    # -- HTML and figures ------------------------------------------------------------------
    def write_html(self, directory: str | Path) -> Path:
        """Write ``check.html`` into a folder: figures embedded as PNG, audio players that
        link the stimulus files (relative to the page, never embedded), the full table last.
        The page names no absolute path, so the same audio gives the same bytes."""
        out = Path(directory)
        out.mkdir(parents=True, exist_ok=True)
        p = out / "check.html"
        p.write_text(_page(self, out), encoding="utf-8")
        return p

    def plot(self, what: str = "spectra"):
        """A figure of the report as a :class:`matplotlib.figure.Figure` (no pyplot state).

        Parameters
        ----------
        what : {"spectra", "positions", "joins"}
            ``"spectra"``: per condition, the envelope spectrum in dB re its neighbouring
            bins with every level's rate labelled and the significance thresholds drawn, and
            the ITPC with the Rayleigh critical values; ``"positions"``: the per-position
            features; ``"joins"``: the join steps.
        """
        makers = {"spectra": _spectra_figure, "positions": _positions_figure,
                  "joins": _joins_figure}
        if what not in makers:
            raise CheckInputError(f"plot(what={what!r}): choose one of {sorted(makers)}")
        if not self._plots:
            raise CheckInputError(
                "this report was read from check.json, which keeps no spectra or per-unit "
                "measures; run stimforge.check(folder) to measure the set again and plot that")
        fig = makers[what](self)
        if fig is None:
            raise CheckInputError(f"plot(what={what!r}): the report holds no data for it")
        return fig

    @classmethod
    def from_dict(cls, d: dict, *, location: str = "") -> "CheckReport":
        """A report read back from its JSON layout (:meth:`to_dict`); it has no figures,
        since the JSON keeps no spectra."""
        v = d.get("verdict", {})
        js = dict(d.get("joins") or {})
        known = {
            "alpha": v.get("alpha"), "design": d.get("design", {}),
            "unit_rate": tuple(d.get("unit_rate") or ()),
            "spectral": tuple(d.get("spectral") or ()),
            "features": tuple(d.get("features") or ()),
            "joins": tuple(js.pop("tests", ()) or ()), "join_summary": js,
            "sensitivity": None if d.get("sensitivity") is None else tuple(d["sensitivity"]),
            "warnings": tuple(d.get("warnings") or ()), "timings": d.get("timings") or {},
            "boundary": tuple(d.get("boundary") or ()), "limits": tuple(v.get("limits") or ()),
            "reference": dict(v.get("reference") or {}), "grid_fit": dict(d.get("grid_fit") or {}),
            "location": location,
        }
        kw = {}
        for f in fields(cls):
            if not f.init:
                continue
            if f.name in known:
                kw[f.name] = known[f.name]
            elif f.name in d:
                kw[f.name] = tuple(d[f.name]) if isinstance(d[f.name], list) else d[f.name]
            elif f.default is MISSING and f.default_factory is MISSING:
                kw[f.name] = None
        return cls(**kw)

    def _repr_html_(self) -> str:
        return _notebook_html(self)

    def __repr__(self) -> str:
        n = len(self.family)
        return (f"CheckReport(passed={self.passed}, significant={len(self.significant)}/{n}, "
                f"alpha={self.alpha:g}, conditions={self.design['conditions']})")


# =============================================================================================
# Rendering: plain words, the terminal text, the figures and the HTML page
# =============================================================================================
#: Colours of the conditions (figures) and of the levels' rate lines, in order.
_COND_COLOURS = ("#0b6e99", "#c2410c", "#6d28d9", "#15803d", "#a16207", "#be185d",
                 "#334155", "#0f766e")
_COND_MARKERS = ("o", "s", "^", "D", "v", "P", "X", "*")
_LEVEL_COLOURS = ("#57606a", "#b35900", "#1f6feb", "#1a7f37", "#8250df", "#bf3989")
_ENV_STYLE = {"broadband": {"color": "#24292f", "lw": 1.1, "ls": "-"},
              "auditory": {"color": "#1f6feb", "lw": 1.0, "ls": "--"}}


def new_figure(*, width_px: int, height_px: int, dpi: int = 100):
    """A :class:`matplotlib.figure.Figure` of a given pixel size, outside pyplot's state.

    No backend is chosen or switched.  Inside a Jupyter kernel whose backend is matplotlib's
    inline one, that backend's module is loaded (as pyplot's first figure would load it), so
    a returned Figure displays as an image there too.
    """
    from matplotlib.figure import Figure

    if "ipykernel" in sys.modules and "matplotlib_inline" in os.environ.get("MPLBACKEND", ""):
        try:
            import matplotlib_inline.backend_inline  # noqa: F401 - registers the display hook
        except ImportError:  # pragma: no cover - ipykernel brings it
            pass
    return Figure(figsize=(width_px / dpi, height_px / dpi), dpi=dpi, layout="constrained")


def figure_png(fig) -> bytes:
    """PNG bytes of a figure at its own size and dpi, without a version stamp (reproducible)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=fig.dpi, metadata={"Software": None})
    return buf.getvalue()


def figure_img(fig, alt: str) -> str:
    b64 = base64.b64encode(figure_png(fig)).decode("ascii")
    w, h = (int(round(v * fig.dpi)) for v in fig.get_size_inches())
    return (f"<img src='data:image/png;base64,{b64}' width='{w}' height='{h}' "
            f"alt='{html.escape(alt, quote=True)}'>")


def _trials_text(design: dict) -> str:
    conds = design.get("conditions", {})
    ns = sorted(set(conds.values()))
    nt = "?" if not ns else (f"{ns[0]}" if len(ns) == 1 else f"{ns[0]}-{ns[-1]}")
    k = len(conds)
    return f"{k} condition{'s' if k != 1 else ''} x {nt} trials"


def _rates_text(design: dict) -> str:
    return ", ".join(f"{lv['name']} {lv['rate']:g} Hz" for lv in design.get("levels", []))


def _verdict_sentence(rep) -> str:
    n = len(rep.family)
    setup = _trials_text(rep.design)
    if rep.state == "inconclusive":
        return (f"No acoustic cue found, but {rep.limits_sentence()}: 0 of {n} tests "
                f"significant (Holm, alpha {rep.alpha:g}; {setup})")
    if rep.passed:
        return (f"No acoustic cue found: 0 of {n} tests significant (Holm, alpha "
                f"{rep.alpha:g}; {setup})")
    sig = rep.significant
    return (f"Acoustic cue found: {len(sig)} of {n} tests significant (Holm, alpha "
            f"{rep.alpha:g}; {setup}); strongest: {_describe(sig[0])}")


def _cue_size(s: dict, which: str = "smallest_detected") -> str:
    """A planted-cue size in words; a floor says so ("or less (the smallest tried)")."""
    unit = UNIT_WORDS.get(s.get("unit", ""), s.get("unit", ""))
    v = s.get(which)
    floor = s.get("at_floor") if which == "smallest_detected" else s.get(
        "envelope_only_at_floor")
    if v is None:
        top = s.get("largest_tried")
        return ("not revealed" if top is None
                else f"not revealed up to {top:g} {unit} (the largest tried)")
    if floor:
        return f"{v:.2g} {unit} or less (the smallest tried)"
    return f"{v:.2g} {unit}"


def _weakest(rows: list[dict]) -> dict:
    """The row whose cue must be largest to be revealed (not revealed counts as largest)."""
    return max(rows, key=lambda s: (s.get("smallest_detected") is None,
                                    s.get("smallest_detected") or 0.0))


def _cue_words(s: dict, unit_name: str, group: str | None = None) -> str:
    """The planted cue in words, e.g. "loudness step on the first syllable"."""
    where = s.get("where") or ""
    cue = s.get("cue")
    if cue == "gap":
        return f"silent gap before {group or 'each ' + str(s['level'])}"
    word = CUE_WORDS.get(cue, plain(cue))
    return f"{word} on the {where} {unit_name}" if where else word


def _found_by(s: dict) -> str:
    """``detected_by`` in plain words, conditions grouped under each test."""
    groups: dict[str, list[str]] = {}
    for item in s.get("detected_by") or ():
        cond, sep, test = str(item).partition(": ")
        if not sep:
            cond, test = "", cond
        groups.setdefault(plain(test), []).append(cond)
    return "; ".join(f"{t} ({', '.join(c for c in cs if c)})" if any(cs) else t
                     for t, cs in groups.items())


def _sens_by_level(rep) -> tuple[list[str], list[str], dict]:
    """(levels, cues, {(level, cue): row}) of the sensitivity rows, in their order."""
    rows = rep.sensitivity or ()
    levels = list(dict.fromkeys(s["level"] for s in rows))
    cues = list(dict.fromkeys(s["cue"] for s in rows))
    return levels, cues, {(s["level"], s["cue"]): s for s in rows}


def _unit_rate_text(rep) -> str:
    d = rep.design
    ur = list(rep.unit_rate)
    if not ur:
        return ""
    rate = ur[0].get("freq")
    head = f"unit rate ({d.get('unit', 'unit')}, {rate:g} Hz)"
    bad = [u for u in ur if not u.get("clear")]
    ratios = [u["ratio"] for u in ur if u.get("ratio") is not None]
    itpc = [u["itpc"] for u in ur if u.get("itpc") is not None]
    span = (f"evoked amplitude {min(ratios):.3g}-{max(ratios):.3g} x its neighbours, ITPC "
            f"{min(itpc):.2f}-{max(itpc):.2f}") if ratios and itpc else ""
    if not bad:
        return f"{head}: a clear peak in every condition and envelope ({span})"
    names = ", ".join(f"{u['condition']} {u['envelope']} envelope" for u in bad)
    return f"{head}: no clear peak in {names} ({span}); the grid may not match the audio"


def _join_text(rep) -> str:
    js = rep.join_summary or {}
    w = js.get("worst")
    if not w:
        return ""
    return (f"joins: worst step {w['score_db']:+.1f} dB re the units' own, in {w['file']} "
            f"(trial {w['trial']}, {w['condition']}) at {w['time']:.4f} s; "
            f"{js.get('n_flagged', 0)} of {js.get('n_boundaries', 0)} joins above "
            f"{js.get('threshold_db', 0):+.0f} dB")


def _cells(rep, r: dict) -> list[str]:
    """condition, level, rate, test, size, p, p_holm, result: one row of any test table."""
    rate = _rate_of(r, rep.design)
    return [str(r.get("condition", "")), str(r.get("level", "")),
            "" if rate is None else f"{rate:g} Hz", _test_name(r), _size_text(r),
            _fmt_p(r.get("p")), _fmt_p(r.get("p_holm")),
            "CUE" if r.get("significant") else "ok"]


_HEAD = ["condition", "level", "rate", "test", "size", "p", "p_holm", "result"]


def _aligned(rows: list[list[str]], indent: str = "  ") -> list[str]:
    """Columns padded to their widest cell: nothing is cut short."""
    table = [_HEAD] + rows
    width = [max(len(r[i]) for r in table) for i in range(len(_HEAD))]
    right = {2, 5, 6}
    out = []
    for r in table:
        cells = [c.rjust(width[i]) if i in right else c.ljust(width[i]) for i, c in enumerate(r)]
        out.append(indent + "  ".join(cells).rstrip())
    return out


def _by_p(r: dict) -> tuple:
    p = r.get("p")
    return (p if p is not None and np.isfinite(p) else np.inf, str(r.get("condition")))


def _breakdown_lines(rep, *, n_rows: int = 3, n_items: int = 3) -> list[str]:
    """What drives the strongest significant feature/boundary/join tests (top few items)."""
    out = []
    for r in [r for r in rep.significant if r.get("breakdown")][:n_rows]:
        b = r["breakdown"]
        unit = UNIT_WORDS.get(b.get("unit", ""), b.get("unit", ""))
        head = (f"what drives '{r['condition']}: {_test_name(r)}': {b.get('flagged_units')} "
                f"(mean {_num(b['flagged'].get('mean'))} {unit}) against the compared units "
                f"({_num(b['compared'].get('mean'))} {unit})")
        out.append(head)
        for key, what in (("by_label", "label"), ("by_token", "token"), ("by_file", "file")):
            items = b.get(key) or []
            if not items or (key == "by_file" and b.get("by_label")):
                continue
            out.append(f"    by {what}: " + "; ".join(
                f"{Path(it['name']).name if key == 'by_file' else it['name']} "
                f"{it['n_flagged']}x there, mean {_num(it['mean_flagged'])} {unit} (elsewhere "
                f"{_num(it['mean_elsewhere'])}, {it['n_elsewhere']}x)" for it in items[:n_items]))
        if b.get("explanation"):
            out.append(f"    {b['explanation']}")
        if b.get("setting"):
            out.append(f"    recipe setting: {b['setting']}")
    return ["  " + x for x in out]


def _text(rep, *, table: bool, show_location: bool, top: int = 5) -> str:
    d = rep.design
    lines = [f"verdict: {rep.verdict} (exit {rep.exit_code})", _verdict_sentence(rep) + "."]
    where = (rep.location or d.get("source", "")) if show_location else d.get("source", "")
    if where == "." and d.get("mode") == "build":
        where = "this build folder"
    kind = "build folder" if d.get("mode") == "build" else "files"
    lines.append(f"checked: {where} ({kind}); rates {_rates_text(d)}; window "
                 f"{d.get('window', 0):g} s (resolution {d.get('resolution', 0):.4g} Hz)")
    lines.append("")
    sig = rep.significant
    if sig:
        shown = sig[:max(top, 10)]
        more = f"; the strongest {len(shown)} shown" if len(shown) < len(sig) else ""
        lines.append(f"significant after Holm correction ({len(sig)}{more}):")
    else:
        shown = sorted(rep.family, key=_by_p)[:top]
        lines.append(f"closest to significance (the {len(shown)} smallest p; none is "
                     "significant after Holm correction):")
    lines += _aligned([_cells(rep, r) for r in shown])
    lines += _breakdown_lines(rep)
    lines.append("")
    ur = _unit_rate_text(rep)
    if ur:
        lines.append(ur)
    if rep.sensitivity:
        if not rep.passed:
            lines.append("sensitivity: " + rep.sensitivity_sentence())
        else:
            lines.append("sensitivity (cues planted into copies of the set at every boundary, "
                         "tested by the same family; smaller cues could hide):")
            levels, cues, cell = _sens_by_level(rep)
            rate = {lv["name"]: lv["rate"] for lv in d.get("levels", [])}
            name_w = max(len(f"{lv} ({rate.get(lv, 0):g} Hz)") for lv in levels)
            unit_name = d.get("unit", "unit")
            for lv in levels:
                parts = [f"{_cue_words(cell[lv, c], unit_name)}: {_cue_size(cell[lv, c])}"
                         for c in cues if (lv, c) in cell]
                label = f"{lv} ({rate.get(lv, 0):g} Hz)"
                lines.append(f"  {label:<{name_w}}  " + "; ".join(parts))
                intact = [(c, cell[lv, c]["intact"]) for c in cues
                          if (lv, c) in cell and cell[lv, c].get("intact")]
                if intact:  # the cue planted in the intact condition only (where material cues live)
                    lines.append(f"  {'':<{name_w}}  intact condition only: " + "; ".join(
                        f"{CUE_WORDS.get(c, c)} {_cue_size({**cell[lv, c], **i})}"
                        for c, i in intact))
            env = [f"{lv} {CUE_WORDS.get(c, c)} {_cue_size(cell[lv, c], 'envelope_only')}"
                   for lv in levels for c in cues
                   if (lv, c) in cell and cell[lv, c].get("envelope_only") is not None]
            if env:
                lines.append("  the envelope tests alone: " + "; ".join(env))
    elif rep.sensitivity is None:
        lines.append("sensitivity: not estimated")
    jt = _join_text(rep)
    if jt:
        lines.append(jt)
    for w in rep.warnings:
        lines.append(f"warning: {plain(w)}")
    if table:
        lines.append("")
        lines.append(f"all {len(rep.family)} tests, smallest p first:")
        lines += _aligned([_cells(rep, r) for r in sorted(rep.family, key=_by_p)])
    else:
        lines.append(f"all {len(rep.family)} tests: stimforge check --table, or the JSON "
                     "(--json PATH)")
    return "\n".join(lines)


# --------------------------------------------------------------------------- figures
def _db_re_neighbours(amp: np.ndarray, *, top_bin: int) -> np.ndarray:
    """Per bin: 10 log10(power / mean power of its noise neighbours), as the evoked test."""
    from .stats import neighbour_bins

    a = np.asarray(amp, dtype=np.float64)
    n = a.size
    excl = frozenset(range(0, n, max(int(top_bin), 1)))
    out = np.full(n, np.nan)
    with np.errstate(divide="ignore", invalid="ignore"):
        for k in range(1, n):
            nb = neighbour_bins(k, n_total=n, exclude=excl)
            den = float(np.mean(a[nb] ** 2)) if nb.size else 0.0
            if den > 0 and a[k] > 0:
                out[k] = 10.0 * np.log10(a[k] ** 2 / den)
    return out


def _rate_axis(ax, design: dict, *, top_labels: bool, f_max: float) -> None:
    from matplotlib.ticker import NullLocator

    levels = design.get("levels", [])
    rates = [lv["rate"] for lv in levels]
    for i, lv in enumerate(levels):
        ax.axvline(lv["rate"], color=_LEVEL_COLOURS[i % len(_LEVEL_COLOURS)], lw=1.0,
                   alpha=0.55, zorder=0)
    ax.set_xscale("log")
    ax.set_xlim(min(rates) * 0.6, f_max)
    ax.set_xticks(sorted(rates), labels=[f"{r:g}" for r in sorted(rates)])
    ax.xaxis.set_minor_locator(NullLocator())
    ax.tick_params(labelsize=7)
    if top_labels:
        sec = ax.secondary_xaxis("top")
        order = sorted(range(len(levels)), key=lambda i: rates[i])
        sec.set_xticks([rates[i] for i in order], labels=[levels[i]["name"] for i in order])
        sec.xaxis.set_minor_locator(NullLocator())
        sec.tick_params(labelsize=7, length=2, pad=1)
        for i, lab in zip(order, sec.get_xticklabels()):
            lab.set_color(_LEVEL_COLOURS[i % len(_LEVEL_COLOURS)])


def _spectra_figure(rep):
    """Key figure: per condition, evoked power in dB re neighbours and ITPC, rates labelled,
    with the one-test and the family-wise thresholds."""
    from scipy import stats as st

    from .stats import neighbour_bins, rayleigh_critical_r

    spectra = rep._plots.get("spectra") or {}
    d = rep.design
    conds = [c for c in d.get("conditions", {}) if any((c, k) in spectra for k in _ENV_STYLE)]
    if not conds:
        return None
    window = float(d["window"])
    top_bin = int(round(min(lv["rate"] for lv in d["levels"]) * window))
    m_family = max(len(rep.family), 1)
    n_cols = len(conds)
    fig = new_figure(width_px=min(1200, max(280 * n_cols + 100, 900)), height_px=430)
    axes = fig.subplots(2, n_cols, squeeze=False)
    any_s = next(iter(spectra.values()))
    n_total = len(any_s["freq"])
    m_nb = int(neighbour_bins(top_bin, n_total=n_total,
                              exclude=frozenset(range(0, n_total, top_bin))).size) or 8
    thr_one = 10 * np.log10(st.f.isf(rep.alpha, 2, 2 * m_nb))
    thr_fam = 10 * np.log10(st.f.isf(rep.alpha / m_family, 2, 2 * m_nb))
    f_max = (n_total - 1) / window
    tops: list[float] = []
    for j, c in enumerate(conds):
        ax0, ax1 = axes[0, j], axes[1, j]
        n_tr = int(d["conditions"][c])
        db_of = {}
        for kind, style in _ENV_STYLE.items():
            s = spectra.get((c, kind))
            if s is None:
                continue
            f = np.asarray(s["freq"], dtype=float)
            db = _db_re_neighbours(np.asarray(s["evoked"]), top_bin=top_bin)
            db_of[kind] = (f, db, np.asarray(s["itpc"], dtype=float))
            ax0.plot(f[1:], db[1:], label=f"{kind} envelope", **style)
            ax1.plot(f[1:], db_of[kind][2][1:], **style)
        ax0.axhline(thr_one, color="#6e7781", lw=0.9, ls=":", label=f"p = {rep.alpha:g}, one test")
        ax0.axhline(thr_fam, color="#cf222e", lw=0.9, ls="-.",
                    label=f"p = {rep.alpha:g} over all {m_family} tests (Holm's strictest step)")
        r_one = rayleigh_critical_r(max(n_tr, 2), rep.alpha)
        r_fam = rayleigh_critical_r(max(n_tr, 2), rep.alpha / m_family)
        ax1.axhline(r_one, color="#6e7781", lw=0.9, ls=":")
        if r_fam < 1.0:
            ax1.axhline(r_fam, color="#cf222e", lw=0.9, ls="-.")
        else:  # few trials: even r = 1 would not pass over the whole family
            ax1.text(0.02, 0.03, f"{n_tr} trials: no ITPC can pass over all {m_family} tests",
                     transform=ax1.transAxes, fontsize=6.5, color="#cf222e")
        for r in rep.spectral:
            if (r.get("condition") != c or not r.get("significant")
                    or r.get("envelope") not in db_of):
                continue
            f, db, itpc = db_of[r["envelope"]]
            k = int(r["bin"])
            if r.get("measure") == "itpc":
                ax1.plot(f[k], itpc[k], "o", ms=6, mfc="none", mec="#cf222e", mew=1.6)
            else:
                ax0.plot(f[k], db[k], "o", ms=6, mfc="none", mec="#cf222e", mew=1.6)
        tops += [np.nanmax(v[1][1:]) for v in db_of.values() if np.any(np.isfinite(v[1][1:]))]
        ax1.set_ylim(0.0, 1.02)
        _rate_axis(ax0, d, top_labels=True, f_max=f_max)
        _rate_axis(ax1, d, top_labels=False, f_max=f_max)
        ax0.set_title(f"{c} ({n_tr} trials)", fontsize=9)
        ax0.tick_params(labelbottom=False)
        ax1.set_xlabel("frequency (Hz, log scale)", fontsize=7, labelpad=1)
        if j == 0:
            ax0.set_ylabel("evoked power, dB re neighbours", fontsize=8)
            ax1.set_ylabel("ITPC (r)", fontsize=8)
    for ax in axes[0]:  # one scale for every condition
        ax.set_ylim(-15.0, min(max([thr_fam + 4.0, *tops]) + 3.0, 80.0))
    handles, labels = axes[0, 0].get_legend_handles_labels()
    from matplotlib.lines import Line2D

    handles.append(Line2D([], [], ls="none", marker="o", mfc="none", mec="#cf222e", mew=1.6))
    labels.append("significant test")
    fig.legend(handles, labels, loc="outside lower center", ncols=5, fontsize=7, frameon=False)
    return fig


def _positions_figure(rep):
    """Per-position features: median over units at each position, every condition visible."""
    feats = rep._plots.get("features") or {}
    d = rep.design
    if not feats:
        return None
    conds = [c for c in d.get("conditions", {}) if c in feats] or sorted(feats)
    levels = d["levels"]
    above = levels[1:]
    fig = new_figure(width_px=min(1200, 330 * len(above) + 90),
                     height_px=175 * len(FEATURES) + 70)
    axes = fig.subplots(len(FEATURES), len(above), squeeze=False)
    nc = len(conds)
    for li, lv in enumerate(above):
        per = int(lv["units_per_group"])
        below = int(levels[li]["units_per_group"])
        n_pos = per // below
        for fi, (fname, _unit) in enumerate(FEATURES):
            ax = axes[fi, li]
            lo_hi = []
            for ci, c in enumerate(conds):
                F = np.asarray(feats[c])[:, :, fi]
                pos = (np.arange(F.shape[1]) % per) // below
                med = np.array([np.nanmedian(F[:, pos == q]) if np.any(np.isfinite(F[:, pos == q]))
                                else np.nan for q in range(n_pos)])
                lo_hi += [v for v in med if np.isfinite(v)]
                dx = (ci - (nc - 1) / 2) * min(0.08, 0.4 / max(nc, 1))
                ax.plot(np.arange(1, n_pos + 1) + dx, med,
                        marker=_COND_MARKERS[ci % len(_COND_MARKERS)], ms=4, lw=1.0,
                        color=_COND_COLOURS[ci % len(_COND_COLOURS)], label=c, alpha=0.9)
            if lo_hi:
                # never zoom in past a span a listener could care about: a 0.01 dB spread
                # drawn full height looks like a cue and is not one
                lo, hi = min(lo_hi), max(lo_hi)
                half = max((hi - lo) / 2 * 1.25, _MIN_HALF_SPAN.get(fname, 0.5))
                mid = (lo + hi) / 2
                ax.set_ylim(mid - half, mid + half)
            ax.set_xlim(0.5, n_pos + 0.5)
            ax.set_xticks(np.arange(1, n_pos + 1))
            ax.ticklabel_format(axis="y", useOffset=False)
            ax.set_ylabel(FEATURE_AXIS.get(fname, fname), fontsize=7)
            ax.tick_params(labelsize=7)
            ax.grid(axis="y", color="#eaeef2", lw=0.6)
            if fi == 0:
                ax.set_title(f"by position in the {lv['name']} ({lv['rate']:g} Hz)", fontsize=9)
            if fi == len(FEATURES) - 1:
                ax.set_xlabel(f"{levels[li]['name']} in the {lv['name']}", fontsize=8)
    handles, labels = axes[0, 0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside lower center", ncols=min(nc, 6), fontsize=8,
               frameon=False)
    return fig


def _joins_figure(rep):
    joins = rep._plots.get("joins") or {}
    if not joins:
        return None
    conds = [c for c in rep.design.get("conditions", {}) if c in joins] or sorted(joins)
    fig = new_figure(width_px=760, height_px=270)
    ax = fig.subplots()
    vals = [np.asarray(joins[c], dtype=float) for c in conds]
    allv = np.concatenate([v[np.isfinite(v)].ravel() for v in vals]) if vals else np.array([])
    allv = allv[allv > -150]
    if allv.size:
        edges = np.linspace(min(allv.min(), -40.0), max(allv.max(), 10.0), 41)
        for ci, (c, v) in enumerate(zip(conds, vals)):
            v = v[np.isfinite(v) & (v > -150)]
            if v.size:
                ax.hist(v, bins=edges, histtype="step", lw=1.2,
                        color=_COND_COLOURS[ci % len(_COND_COLOURS)], label=c)
    thr = (rep.join_summary or {}).get("threshold_db", 0.0)
    ax.axvline(thr, color="#cf222e", ls="-.", lw=1.0, label=f"click threshold {thr:+.0f} dB")
    ax.set_xlabel("largest sample step within 2 ms of a boundary, dB re the units' own",
                  fontsize=8)
    ax.set_ylabel("joins", fontsize=8)
    ax.tick_params(labelsize=7)
    ax.legend(fontsize=7, frameon=False)
    return fig


# --------------------------------------------------------------------------- HTML
PAGE_CSS = """
*{box-sizing:border-box}
body{margin:0;font:15px/1.45 system-ui,-apple-system,"Segoe UI",Roboto,sans-serif;color:#1f2328;background:#fff}
main{max-width:1240px;margin:0 auto;padding:10px 20px 48px}
nav{font-size:13px;color:#57606a;border-bottom:1px solid #d8dee4;padding-bottom:6px}
nav a{color:#0969da;text-decoration:none;margin-left:14px}
h1.verdict{font-size:26px;margin:10px 0 2px}
.pass{color:#1a7f37}.cue{color:#cf222e}
p.lead{margin:2px 0 8px;max-width:1120px}
h2{font-size:19px;margin:26px 0 6px;border-bottom:1px solid #d8dee4;padding-bottom:3px}
figure{margin:4px 0 12px}
figcaption{font-size:13px;color:#57606a;max-width:1120px}
img{display:block;max-width:100%;height:auto}
table{border-collapse:collapse;font-size:13px;margin:4px 0}
th,td{border:1px solid #d0d7de;padding:3px 7px;text-align:left;vertical-align:top;overflow-wrap:anywhere}
th{background:#f6f8fa}
td.num{text-align:right;white-space:nowrap}
table.sens tbody th{white-space:nowrap}
tr.flag td{background:#ffebe9}
table.all{width:100%}
table.sortable th{cursor:pointer}
table.sortable th:hover{background:#eaeef2}
small.by{display:block;color:#57606a;font-size:12px}
.players{display:flex;flex-wrap:wrap;gap:14px}
.players figure{margin:0}
details summary{cursor:pointer;font-weight:600}
""".strip()

SORT_SCRIPT = """
document.querySelectorAll("table.sortable").forEach(function(t){
  t.querySelectorAll("th").forEach(function(th,i){
    th.title="sort";
    th.addEventListener("click",function(){
      var b=t.tBodies[0],rows=Array.prototype.slice.call(b.rows),up=th.dataset.dir!=="up";
      th.dataset.dir=up?"up":"down";
      function key(r){var c=r.cells[i],v=c.dataset.v!==undefined?c.dataset.v:c.textContent;
        var n=parseFloat(v);return isNaN(n)?v.toLowerCase():n;}
      rows.sort(function(x,y){var a=key(x),c=key(y);return (a>c?1:a<c?-1:0)*(up?1:-1);});
      rows.forEach(function(r){b.appendChild(r);});
    });
  });
});
""".strip()


def _h(s) -> str:
    return html.escape(str(s))


def _sens_table(rep) -> str:
    levels, cues, cell = _sens_by_level(rep)
    if not levels:
        return ""
    d = rep.design
    rate = {lv["name"]: lv["rate"] for lv in d.get("levels", [])}
    unit_name = d.get("unit", "unit")
    first = {c: next(cell[lv, c] for lv in levels if (lv, c) in cell) for c in cues}
    head = "".join(f"<th>{_h(_cue_words(first[c], unit_name, group='the group'))}</th>"
                   for c in cues)
    has_env = any(s.get("envelope_only") is not None for s in cell.values())
    head += "<th>the envelope tests alone</th>" if has_env else ""
    body = []
    for lv in levels:
        tds = []
        for c in cues:
            s = cell.get((lv, c))
            if s is None:
                tds.append("<td></td>")
                continue
            by = _found_by(s)
            tds.append(f"<td>{_h(_cue_size(s))}"
                       + (f"<small class='by'>revealed by {_h(by)}</small>" if by else "")
                       + "</td>")
        if has_env:
            env = [f"{CUE_WORDS.get(c, c)} {_cue_size(cell[lv, c], 'envelope_only')}"
                   for c in cues
                   if (lv, c) in cell and cell[lv, c].get("envelope_only") is not None]
            tds.append(f"<td>{_h('; '.join(env))}</td>")
        body.append(f"<tr><th>{_h(lv)} ({rate.get(lv, 0):g} Hz)</th>{''.join(tds)}</tr>")
    return (f"<table class='sens'><thead><tr><th>boundary</th>{head}</tr></thead>"
            f"<tbody>{''.join(body)}</tbody></table>")


def _sens_section(rep) -> str:
    if rep.sensitivity is None:
        return ("<section id='sensitivity'><h2>Sensitivity</h2><p>Not estimated (run the "
                "check with sensitivity on to learn how large a cue could hide).</p></section>")
    if not rep.sensitivity:
        return ""
    if not rep.passed:
        intro = ("The set already shows a cue, so the planted-cue sizes below say nothing "
                 "about hidden ones; they are listed for completeness.")
    else:
        intro = ("Cues planted into copies of this set at every boundary of a level, and "
                 "tested by the same family of tests: the smallest size each one needs to be "
                 "revealed. Smaller cues of these kinds could hide in the set.")
    ref = ""
    units = {"level_step": "dB", "gap": "ms", "pitch_step": "semitones"}
    if rep.reference:
        sizes = ", ".join(f"{CUE_WORDS.get(c, plain(c))} {v:g} {units.get(c, '')}".rstrip()
                          for c, v in rep.reference.items())
        lim = rep.limits_sentence() if rep.limits else ""
        ref = (f"<p>Reference cues (what a pass vouches for): {_h(sizes)}. "
               + (_h(lim[:1].upper() + lim[1:]) + "." if lim else
                  "Each would have been revealed at every level.") + "</p>")
    return (f"<section id='sensitivity'><h2>Sensitivity: what \u201cno cue\u201d is worth</h2>"
            f"<p>{_h(intro)}</p>{ref}{_sens_table(rep)}</section>")


def _tests_table(rep, rows: list[dict], *, cls: str) -> str:
    body = []
    for r in rows:
        c = _cells(rep, r)
        p, ph = r.get("p"), r.get("p_holm")
        rate = _rate_of(r, rep.design)
        vals = {2: "" if rate is None else f"{rate:.6g}",
                5: "" if p is None else f"{p:.6g}", 6: "" if ph is None else f"{ph:.6g}"}
        tds = "".join(
            (f"<td class='num' data-v='{vals[i]}'>" if i in vals else "<td>") + _h(v) + "</td>"
            for i, v in enumerate(c))
        body.append(f"<tr class='flag'>{tds}</tr>" if r.get("significant") else f"<tr>{tds}</tr>")
    head = "".join(f"<th>{_h(h)}</th>" for h in _HEAD)
    return (f"<table class='{cls}'><thead><tr>{head}</tr></thead><tbody>{''.join(body)}"
            "</tbody></table>")


def _players(rep, directory: Path | None) -> str:
    """One player per condition (its first trial), linking the file beside the report."""
    d = rep.design
    files = list(d.get("files") or [])
    counts = d.get("conditions", {})
    out, i = [], 0
    root = Path(rep.location) if rep.location else None
    for c, n in counts.items():
        chunk = files[i:i + int(n)]
        i += int(n)
        if not chunk:
            continue
        name = sorted(chunk)[0]
        path = Path(name)
        if not path.is_absolute():
            if d.get("mode") == "build":  # names relative to the build folder
                base = root if root is not None else (
                    Path(directory).parent if directory is not None else Path.cwd())
            else:
                base = Path.cwd()
            path = base / path
        if directory is not None:
            src = Path(os.path.relpath(path.absolute(), Path(directory).absolute())).as_posix()
        else:
            src = path.as_posix()
        label = f"{c}: {Path(name).name}"
        out.append(f"<figure><figcaption>{_h(label)}</figcaption><audio controls "
                   f"preload='none' src='{_h(src)}'></audio></figure>")
    if not out:
        return ""
    return ("<section id='listen'><h2>Listen</h2><p>One trial per condition; the players link "
            "the stimulus files (nothing is embedded). Set the presentation level on the real "
            f"transducer first.</p><div class='players'>{''.join(out)}</div></section>")


def _generic(value) -> str:
    """Any JSON-like value as HTML: lists of records as tables, mappings as key/value rows."""
    if isinstance(value, (list, tuple)) and value and all(isinstance(v, dict) for v in value):
        cols = list(dict.fromkeys(k for v in value for k in v))
        head = "".join(f"<th>{_h(plain(k))}</th>" for k in cols)
        rows = "".join("<tr>" + "".join(f"<td>{_generic_cell(v.get(k))}</td>" for k in cols)
                       + "</tr>" for v in value)
        return f"<table><thead><tr>{head}</tr></thead><tbody>{rows}</tbody></table>"
    if isinstance(value, dict):
        rows = "".join(f"<tr><th>{_h(plain(k))}</th><td>{_generic_cell(v)}</td></tr>"
                       for k, v in value.items())
        return f"<table>{rows}</table>"
    return f"<p>{_generic_cell(value)}</p>"


def _generic_cell(v) -> str:
    if isinstance(v, float):
        return _h(_num(v, ".4g"))
    if isinstance(v, (list, tuple)) and all(not isinstance(x, (dict, list)) for x in v):
        return _h(", ".join(_num(x, ".4g") if isinstance(x, float) else plain(x) for x in v))
    if isinstance(v, dict) and all(not isinstance(x, (dict, list)) for x in v.values()):
        return _h("; ".join(
            f"{plain(k).replace('_', ' ')} {_num(x, '.4g') if isinstance(x, float) else x}"
            for k, x in v.items()) or "none")
    if isinstance(v, (dict, list, tuple)):
        return _h(json_dumps(v, sort_keys=False).strip()) if v else "none"
    return _h(plain(v) if isinstance(v, str) else v)


_KNOWN_TOP = {"schema_version", "stimforge_version", "verdict", "design", "unit_rate",
              "spectral", "features", "joins", "sensitivity", "warnings", "timings",
              "boundary"}  # boundary rows are in the all-tests table
_KNOWN_VERDICT = {"passed", "exit_code", "summary", "alpha", "correction", "family_size",
                  "significant", "caution", "state", "vouched", "limits", "reference"}
# (state and vouched are the heading, limits and reference the sensitivity section)


def _extras(rep) -> tuple[str, str]:
    """Sections for what the report holds beyond the layout above (rendered generically):
    (verdict details, other sections)."""
    d = rep.to_dict()
    v = {k: x for k, x in d.get("verdict", {}).items() if k not in _KNOWN_VERDICT}
    vhtml = (f"<section id='verdict-details'><h2>Verdict details</h2>{_generic(v)}</section>"
             if v else "")
    parts = []
    for k, x in d.items():
        if k in _KNOWN_TOP or x is None or x == [] or x == {}:
            continue
        title = plain(k).replace("_", " ")
        parts.append(f"<section id='{_h(k)}'><h2>{_h(title[:1].upper() + title[1:])}</h2>"
                     f"{_generic(x)}</section>")
    return vhtml, "".join(parts)


def _lead_html(rep) -> str:
    js = rep.join_summary or {}
    clicks = ""
    if js.get("n_flagged"):
        w = js["worst"]
        clicks = (f" {js['n_flagged']} join(s) have a click-like step; the worst is in "
                  f"{w['file']} at {w['time']:.3f} s.")
    d = rep.design
    sens = ""
    if rep.sensitivity and rep.passed:
        sens = " " + rep.sensitivity_sentence()[:1].upper() + rep.sensitivity_sentence()[1:] + \
            " (per level below)."
    return (f"{_verdict_sentence(rep)}; rates {_rates_text(d)}, {d.get('window', 0):g} s "
            f"analysed per trial.{sens}{clicks}")


def _drivers_section(rep, *, n_rows: int = 5) -> str:
    """What drives each significant feature / boundary / join test: label, token, file."""
    rows = [r for r in rep.significant if r.get("breakdown")][:n_rows]
    if not rows:
        return ""
    out = []
    for r in rows:
        b = r["breakdown"]
        unit = UNIT_WORDS.get(b.get("unit", ""), b.get("unit", ""))
        items = []
        for key, what in (("by_label", "label"), ("by_token", "token"), ("by_file", "file")):
            for it in b.get(key) or []:
                items.append(f"<tr><td>{_h(what)}</td><td>{_h(it['name'])}</td>"
                             f"<td class='num'>{it['n_flagged']}</td><td class='num'>"
                             f"{_h(_num(it['mean_flagged']))}</td><td class='num'>"
                             f"{it['n_elsewhere']}</td><td class='num'>"
                             f"{_h(_num(it['mean_elsewhere']))}</td></tr>")
        setting = (f" Recipe setting: {_h(b['setting'])}." if b.get("setting") else "")
        out.append(f"<h3>{_h(r['condition'])}: {_h(_test_name(r))} ({_h(_size_text(r))})</h3>"
                   f"<p>Flagged: {_h(b.get('flagged_units', ''))}, mean "
                   f"{_h(_num(b['flagged'].get('mean')))} {_h(unit)} against "
                   f"{_h(_num(b['compared'].get('mean')))} {_h(unit)} at the compared units. "
                   f"{_h(b.get('explanation', ''))}.{setting}</p>"
                   "<table><thead><tr><th>by</th><th>name</th><th>n there</th><th>mean there"
                   f" ({_h(unit)})</th><th>n elsewhere</th><th>mean elsewhere</th></tr></thead>"
                   f"<tbody>{''.join(items)}</tbody></table>")
    return ("<section id='drivers'><h2>What drives the cue</h2>" + "".join(out) + "</section>")


def _page(rep, directory: Path | None) -> str:
    d = rep.design
    ok = rep.passed
    where = d.get("source", "")
    where = "this build folder" if where == "." and d.get("mode") == "build" else where
    nav = [f"<span>stimforge acoustic check of {_h(where)}</span>",
           "<a href='#sensitivity'>sensitivity</a>", "<a href='#positions'>per position</a>",
           "<a href='#joins'>joins</a>", "<a href='#listen'>listen</a>",
           "<a href='#tests'>all tests</a>"]
    if directory is not None and (Path(directory) / "processing.html").is_file():
        nav.append("<a href='processing.html'>processing report</a>")
    parts = [f"<nav>{''.join(nav)}</nav>",
             f"<h1 class='verdict {'pass' if rep.state == 'pass' else 'cue'}'>"
             f"{_h(rep.verdict)} \u2014 {_h(rep.verdict_meaning)}</h1>",
             f"<p class='lead'>{_h(_lead_html(rep))}</p>"]
    fig = _spectra_figure(rep) if rep._plots else None
    if fig is not None:
        parts.append(
            "<figure id='key'>" + figure_img(fig, "envelope spectra and ITPC per condition")
            + "<figcaption>Per condition: the envelope spectrum (complex mean over trials) as "
            "power in dB re its neighbouring bins (top) and the inter-trial phase coherence "
            "(bottom); solid: broadband envelope, dashed: auditory (gammatone) envelope. "
            "Vertical lines and the labels on top mark each level's rate. Dotted: p = "
            f"{rep.alpha:g} for one test (the F test of the evoked power, the Rayleigh test "
            "of the ITPC); dash-dot: the same over the whole family (alpha divided by the "
            "number of tests, the first step of Holm's correction). Circles mark significant "
            "tests.</figcaption></figure>")
    parts.append(_drivers_section(rep))
    parts.append(_sens_section(rep))
    vextra, extra = _extras(rep)
    parts.append(vextra)
    pf = _positions_figure(rep) if rep._plots else None
    if pf is not None:
        parts.append(
            "<section id='positions'><h2>By position</h2><figure>"
            + figure_img(pf, "per-position features")
            + "<figcaption>Median over units at each position of the level, one line per "
            "condition (markers offset sideways so that identical lines stay visible). Each "
            "panel spans at least 1 dB, 10 ms, 1 semitone or 100 Hz, so that differences too "
            "small to matter look flat. Pitch in semitones re 100 Hz.</figcaption></figure>"
            "</section>")
    jt = _join_text(rep)
    jf = _joins_figure(rep) if rep._plots else None
    if jt or jf is not None:
        parts.append("<section id='joins'><h2>Joins</h2>"
                     + (f"<p>{_h(jt[0].upper() + jt[1:])}.</p>" if jt else "")
                     + (f"<figure>{figure_img(jf, 'join steps')}<figcaption>Boundaries to the "
                        "right of "
                        "the dash-dot line are flagged as clicks.</figcaption></figure>"
                        if jf is not None else "") + "</section>")
    parts.append(_players(rep, directory))
    ur = _unit_rate_text(rep)
    if ur:
        rows = "".join(
            f"<tr><td>{_h(u['condition'])}</td><td>{_h(u['envelope'])}</td>"
            f"<td class='num'>{_num(u.get('ratio'))}</td><td class='num'>"
            f"{_num(u.get('itpc'), '.3f')}</td><td>{'clear' if u.get('clear') else 'NO PEAK'}"
            "</td></tr>" for u in rep.unit_rate)
        parts.append("<section id='unit-rate'><h2>Unit-rate peak: does the grid match the "
                     f"audio?</h2><p>{_h(ur[0].upper() + ur[1:])}.</p><table><thead><tr>"
                     "<th>condition</th><th>envelope</th><th>evoked amplitude re neighbours"
                     "</th><th>ITPC</th><th>peak</th></tr></thead><tbody>" + rows
                     + "</tbody></table></section>")
    if rep.warnings:
        parts.append("<section id='warnings'><h2>Warnings</h2><ul>"
                     + "".join(f"<li>{_h(plain(w))}</li>" for w in rep.warnings)
                     + "</ul></section>")
    parts.append(
        "<section id='scope'><h2>What this check can and cannot vouch for</h2><p>It measures "
        "the audio: envelope energy and phase locking at the structure's rates, and loudness, "
        "active duration, pitch, spectral centroid and steepest-rise latency by position. A "
        "pass means none of these differs by position beyond what chance allows at the stated "
        "alpha, and the sensitivity table says how large a cue could hide. It cannot vouch "
        "for what listeners impose on neutral audio (imagined prosody, lexical knowledge), nor "
        "for cues it does not measure (e.g. co-articulation, or vowel quality by position "
        "beyond the spectral centroid).</p></section>")
    parts.append(extra)
    sig = rep.significant
    summary = (f"All {len(rep.family)} tests, smallest p first ({len(sig)} significant, "
               "highlighted); click a column to sort")
    parts.append(f"<section id='tests'><h2>All tests</h2><details{'' if ok else ' open'}>"
                 f"<summary>{_h(summary)}</summary>"
                 + _tests_table(rep, sorted(rep.family, key=_by_p), cls="all sortable")
                 + "</details></section>")
    return ("<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
            "<meta name='viewport' content='width=device-width, initial-scale=1'>"
            f"<title>stimforge acoustic check: {_h(rep.verdict)}</title><style>{PAGE_CSS}</style>"
            "</head><body><main>" + "".join(p for p in parts if p)
            + f"</main><script>{SORT_SCRIPT}</script></body></html>\n")


def _notebook_html(rep) -> str:
    """A short block for a notebook: verdict, paragraph, sensitivity, the top tests."""
    ok = rep.passed
    sig = rep.significant
    shown = sig if sig else sorted(rep.family, key=_by_p)[:5]
    what = (f"significant after Holm ({len(sig)})" if sig
            else f"closest to significance (the {len(shown)} smallest p; none significant)")
    return (f"<div><h3 style='color:{'#1a7f37' if rep.state == 'pass' else '#cf222e'};margin:4px 0'>"
            f"{_h(rep.verdict)} \u2014 {_h(rep.verdict_meaning)}</h3>"
            f"<p>{_h(_lead_html(rep))}</p>" + (_sens_table(rep) if ok else "")
            + f"<p><b>{_h(what)}</b></p>" + _tests_table(rep, shown, cls="top")
            + "<p><small>check.plot() draws the key figure (also 'positions', 'joins'); "
            "check.format_table() lists every test; check.write_html(folder) writes the "
            "page.</small></p></div>")
