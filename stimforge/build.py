"""`build`: recipe -> corpus -> re-timed tokens -> design -> assembled trials -> files on disk.

This is the orchestration layer; each stage lives in its own module.  Data flows one way:
``recipe`` -> ``corpus`` -> ``retime`` -> ``design`` -> ``assemble`` -> ``export``, and the
acoustic check (``verify``) reads only what export wrote.
"""

from __future__ import annotations

import errno
import html
import logging
import os
import platform
import sys
import types
import time
import dataclasses
from dataclasses import dataclass, field
from importlib import metadata
from pathlib import Path
from typing import Any, Callable

import numpy as np
import soundfile as sf

from ._version import __version__
from .acoustics import peak_dbfs
from .assemble import assemble_trial, trial_layout, unit_rows
from .defaults import MAX_JOBS
from .errors import BuildError, RecipeError
from .events import (EVENT_COLUMNS, PLAYLIST_COLUMNS, CodeTable, assign_values, code_table,
                     jitter_rng, marker_channel, plan_list, playlist_rows)
from .audio_io import write_wav as _write_wav  # (tests replace it to simulate a full disk)
from .export import (LOG, MANIFEST, commit_output, discard_partial, json_dumps,
                     output_digests, prepare_output, sha256_file, write_tsv)
from .recipe import Recipe, load_recipe
from .timing import table_samples, table_seconds

__all__ = ["build", "BuildResult", "open_build", "BuildEstimate", "estimate_build", "TRIAL_COLUMNS",
           "UNIT_COLUMNS"]

log = logging.getLogger("stimforge")

TRIAL_COLUMNS = [
    "stim_file", "condition", "kind", "trial", "repetition", "list", "order", "value",
    "duration", "n_units", "lead_in_units", "analysis_onset", "analysis_duration", "lufs",
    "peak_dbfs",
]
UNIT_COLUMNS = [
    "stim_file", "condition", "trial", "level", "index", "position", "label", "onset",
    "duration", "token", "lead_in", "reversed",
]
DEPENDENCIES = ["numpy", "scipy", "soundfile", "pyworld", "praat-parselmouth", "pydantic",
                "pyyaml", "soxr", "pyloudnorm", "matplotlib"]

CAUTION = (
    "Before anyone listens: digital level (dBFS) is not sound pressure. Calibrate the "
    "presentation level on the actual transducer with a sound level meter; keep the fades; "
    "run experiments on people only with ethics approval. Local rules and your lab's licensed "
    "practice decide."
)


def _versions() -> dict[str, str]:
    out = {"python": platform.python_version()}
    for name in DEPENDENCIES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:  # pragma: no cover
            out[name] = "n/a"
    return out


def _portable_recipe(recipe: Recipe) -> dict[str, Any]:
    """The resolved recipe with its paths relative to the recipe's folder (no machine paths)."""
    d = recipe.to_dict()
    base = recipe.base_dir

    def rel(v: Any) -> Any:
        if isinstance(v, str) and os.path.isabs(v):
            return Path(os.path.relpath(v, base)).as_posix()
        return v

    for section, keys in {"corpus": ["index", "recording", "textgrid"], "material": ["text"]}.items():
        for k in keys:
            d[section][k] = rel(d[section].get(k))
    d["retime"]["cache_dir"] = None  # where the cache lives does not change any output
    d["retime"]["jobs"] = None  # nor does the number of workers
    return d


_SHOWN_WARNINGS = 10  # re-timing warnings shown on the terminal (all go to summary.txt)

# errno of a failed write -> what would fix it
_WRITE_ERRNOS = {
    errno.ENOSPC: "the disk is full: free some space or choose a --out on another disk",
    errno.EDQUOT: "the disk quota is used up: free some of it or choose another --out",
    errno.EFBIG: "a file is too large for this disk's file system: choose another --out",
    errno.EROFS: "the disk is read-only: choose a --out on a writable disk",
    errno.EACCES: "permission denied: choose a --out in a folder you may write to",
    errno.EPERM: "permission denied: choose a --out in a folder you may write to",
    errno.EIO: "the disk reported an input/output error: check it, or choose another --out",
}



def checked_seed(seed: Any) -> int:
    """A seed override: a whole number in [0, 2**63) (numpy's SeedSequence takes no negatives).

    Raises
    ------
    RecipeError
        Naming the value and the allowed range.
    """
    ok = isinstance(seed, (int, np.integer)) and not isinstance(seed, bool)
    if not ok or not 0 <= int(seed) < 2**63:
        raise RecipeError(f"seed (--seed) {seed!r}: must be a whole number from 0 to "
                          f"{2**63 - 1} (2**63 - 1)")
    return int(seed)


def checked_jobs(jobs: Any) -> int:
    """A worker count: a whole number from 1 to :data:`MAX_JOBS`.

    Raises
    ------
    RecipeError
        Naming the value, the allowed range and this machine's CPU count.
    """
    ok = isinstance(jobs, (int, np.integer)) and not isinstance(jobs, bool)
    cpus = os.cpu_count() or 1
    if not ok or not 1 <= int(jobs) <= MAX_JOBS:
        raise RecipeError(f"jobs (--jobs) {jobs!r}: must be a whole number from 1 to {MAX_JOBS} "
                          f"(worker processes; this machine has {cpus} CPU(s))")
    if int(jobs) > cpus:
        log.warning("--jobs %d: this machine has %d CPU(s); extra workers only cost memory",
                    int(jobs), cpus)
    return int(jobs)


def _warnings_section(warns: Any) -> str:
    """The re-timing warnings for summary.txt (empty when there are none)."""
    if not warns:
        return ""
    return (f"\nRe-timing warnings ({len(warns)}; the recipe's retime settings allow them, e.g. "
            "out_of_range: warn or cut-pad; also in the manifest's token records):\n"
            + "".join(f"  {w}\n" for w in warns))


# --------------------------------------------------------------------------- size estimate
# Sane bounds for one build; beyond them a build needs allow_large=True (--allow-large).
LIMIT_OUTPUT_BYTES = 10 * 1024**3
LIMIT_MEMORY_BYTES = 4 * 1024**3
LIMIT_SECONDS = 4 * 3600.0
LIMIT_ROWS = 2_000_000
# Cost model, rounded up from two cut-pad builds measured on a 2-core machine (16 kHz, no
# check): 400 files / 4.5 h of audio / 112k rows: 17 s, max RSS 380 MB; 2000 files / 1 h /
# 152k rows: 16 s, 478 MB.  The check's real-time factor is the README's (0.02-0.03).
_BASE_MEMORY = 250 * 1024**2  # interpreter, numpy/scipy/pyworld/matplotlib loaded
_BYTES_PER_ROW = 2500  # one table row: plan, row dict, manifest entry, the check's copy
_BYTES_PER_SAMPLE = 8 * 8  # one trial in float64, and the check's envelopes and copies of it
_SECONDS_PER_AUDIO_SECOND = 0.002  # assembling, measuring, writing
_SECONDS_PER_FILE = 0.002
_CHECK_SECONDS_PER_AUDIO_SECOND = 0.03
_SECONDS_PER_ROW = 80e-6


def _physical_memory() -> int | None:
    try:
        return int(os.sysconf("SC_PAGE_SIZE")) * int(os.sysconf("SC_PHYS_PAGES"))
    except (AttributeError, ValueError, OSError):
        return None


def _human_bytes(n: float) -> str:
    for unit in ("B", "kB", "MB", "GB", "TB"):
        if abs(n) < 1000 or unit == "TB":
            return f"{n:.3g} {unit}" if unit != "B" else f"{int(n)} B"
        n /= 1000.0
    return f"{n:.3g} TB"  # pragma: no cover


def _human_seconds(s: float) -> str:
    if s < 90:
        return f"{s:.3g} s"
    if s < 5400:
        return f"{s / 60:.3g} min"
    if s < 172800:
        return f"{s / 3600:.3g} h"
    return f"{s / 86400:.3g} days"


@dataclass(frozen=True)
class BuildEstimate:
    """What a build of a recipe will write and cost, estimated before any work.

    Attributes
    ----------
    n_files : int
        Distinct stimulus files (conditions x trials).
    audio_seconds : float, seconds
        Their total duration.
    output_bytes : int
        WAV files (and marker copies) plus tables, bytes.
    memory_bytes : int
        Peak memory of the build, bytes (a model: a base plus per table row and per sample).
    seconds : float, seconds
        Time to assemble, write and check; re-timing the tokens comes on top (it depends on
        the corpus, and the analysis cache makes reruns fast).
    unit_rows, presentation_rows : int
        Rows of units.tsv and trials.tsv.
    """

    n_files: int
    audio_seconds: float
    output_bytes: int
    memory_bytes: int
    seconds: float
    unit_rows: int
    presentation_rows: int

    def format(self) -> str:
        return (f"{self.n_files} stimulus files, {_human_seconds(self.audio_seconds)} of audio, "
                f"{_human_bytes(self.output_bytes)} on disk, about "
                f"{_human_bytes(self.memory_bytes)} of memory and {_human_seconds(self.seconds)} "
                f"(plus re-timing the tokens); {self.unit_rows} units.tsv rows, "
                f"{self.presentation_rows} trials.tsv rows")

    def problems(self) -> tuple[list[str], list[str]]:
        """(beyond the sane limits, beyond this machine): one line per excess."""
        soft = []
        if self.output_bytes > LIMIT_OUTPUT_BYTES:
            soft.append(f"{_human_bytes(self.output_bytes)} of output (limit "
                        f"{_human_bytes(LIMIT_OUTPUT_BYTES)})")
        if self.memory_bytes > LIMIT_MEMORY_BYTES:
            soft.append(f"about {_human_bytes(self.memory_bytes)} of memory (limit "
                        f"{_human_bytes(LIMIT_MEMORY_BYTES)})")
        if self.seconds > LIMIT_SECONDS:
            soft.append(f"about {_human_seconds(self.seconds)} of work (limit "
                        f"{_human_seconds(LIMIT_SECONDS)})")
        rows = self.unit_rows + self.presentation_rows
        if rows > LIMIT_ROWS:
            soft.append(f"{rows} table rows (limit {LIMIT_ROWS})")
        hard = []
        phys = _physical_memory()
        if phys is not None and self.memory_bytes > 0.9 * phys:
            hard.append(f"about {_human_bytes(self.memory_bytes)} of memory, but this machine "
                        f"has {_human_bytes(phys)}")
        return soft, hard

    def refuse(self, *, allow_large: bool = False) -> None:
        """Raise unless the build is within bounds (or ``allow_large`` and it fits the machine).

        Raises
        ------
        BuildError
            With the estimate's numbers, the limits exceeded and what to change.
        """
        soft, hard = self.problems()
        fix = ("use fewer trials (trials.per_condition), fewer or shorter groups per trial, "
               "fewer lists or a lower output.sample_rate")
        if hard:
            raise BuildError(f"this set cannot be built here: {'; '.join(hard)} "
                             f"(estimate: {self.format()}); {fix}")
        if soft and not allow_large:
            raise BuildError(f"this set is larger than a build makes without being asked: "
                             f"{'; '.join(soft)} (estimate: {self.format()}); {fix}, or pass "
                             "--allow-large (build(..., allow_large=True)) if you mean it")


def estimate_build(recipe: Recipe, *, check: bool | None = None) -> BuildEstimate:
    """Estimate what building ``recipe`` writes and costs, from the recipe alone (no I/O).

    Parameters
    ----------
    recipe : Recipe
    check : bool, optional
        Whether the acoustic check runs (default: the recipe's ``check.run``).

    Returns
    -------
    BuildEstimate
    """
    rt = recipe.rates()
    tr = recipe.trials
    names = [c.name for c in recipe.conditions]
    n_files = len(names) * tr.per_condition
    rep = recipe.repeat
    hearings = {c: 1 + (rep.times if rep is not None and c in rep.conditions else 0) for c in names}
    per_list = (tr.per_condition * sum(hearings.values()) / len(names) if tr.rotate_items
                else tr.per_condition * sum(hearings.values()))
    presentations = round(per_list) * tr.lists
    h = recipe.hierarchy
    rows_per_trial = sum(rt.units_per_trial // h.units_per(n) for n in h.names)
    unit_rows = n_files * rows_per_trial
    bps = {"PCM_16": 2, "PCM_24": 3, "PCM_32": 4}[recipe.output.subtype]
    channels = 1 + (2 if recipe.events.marker_channel else 0)  # a stereo marker copy
    audio_bytes = n_files * rt.trial_samples * bps * channels
    table_bytes = unit_rows * 100 + presentations * 250  # trials.tsv, events/ files
    run_check = recipe.check.run if check is None else check
    seconds = (n_files * (rt.trial_duration * _SECONDS_PER_AUDIO_SECOND + _SECONDS_PER_FILE)
               + (n_files * rt.trial_duration * _CHECK_SECONDS_PER_AUDIO_SECOND if run_check else 0)
               + (unit_rows + presentations) * _SECONDS_PER_ROW)
    memory = (_BASE_MEMORY + (unit_rows + presentations) * _BYTES_PER_ROW
              + rt.trial_samples * _BYTES_PER_SAMPLE)
    return BuildEstimate(n_files=n_files, audio_seconds=n_files * rt.trial_duration,
                         output_bytes=int(audio_bytes + table_bytes), memory_bytes=int(memory),
                         seconds=float(seconds), unit_rows=int(unit_rows),
                         presentation_rows=presentations)


def _lufs(x: np.ndarray, sr: int) -> float:
    import pyloudnorm

    if x.size < int(0.4 * sr) or not np.any(x):
        return float("nan")
    return float(pyloudnorm.Meter(sr).integrated_loudness(x))


@dataclass(frozen=True, repr=False)
class BuildResult:
    """What a build produced, or a finished build folder reopened (:func:`open_build`).

    The same object either way: tables as pandas DataFrames, figures as
    :class:`matplotlib.figure.Figure`, the acoustic check as a
    :class:`~stimforge.verify_report.CheckReport`, and a short HTML view for notebooks.

    Attributes
    ----------
    out : Path
        The build folder.
    recipe : Recipe or None
        The recipe as built (reopened: rebuilt from the manifest; None if it no longer
        validates).
    trial_rows, unit_rows : list of dict
        The rows of trials.tsv and units.tsv (numbers as numbers).
    manifest : dict
        The content of manifest.json.
    check : CheckReport or None
        The acoustic check of the set (None if it was not run).  Reopened from check.json it
        carries no figures: ``stimforge.check(result.out)`` measures again.
    summary : str
        The text of summary.txt.
    warnings : tuple of str
        Re-timing warnings.
    """

    out: Path
    recipe: Recipe | None
    trial_rows: list[dict[str, Any]]
    unit_rows: list[dict[str, Any]]
    manifest: dict[str, Any]
    check: Any = None
    summary: str = ""
    warnings: tuple[str, ...] = field(default_factory=tuple)

    # -- tables ----------------------------------------------------------------------------
    @property
    def trials(self):
        """trials.tsv as a DataFrame: one row per presentation (needs pandas)."""
        return _frame(self.trial_rows, TRIAL_COLUMNS, "trials")

    @property
    def units(self):
        """units.tsv as a DataFrame: one row per unit and per group of every level."""
        return _frame(self.unit_rows, UNIT_COLUMNS, "units")

    @property
    def tokens(self):
        """Per token: F0 and loudness before/after, stretch factor, QC flags, uses."""
        from .build_report import token_rows

        return _frame(token_rows(self.manifest), None, "tokens")

    @property
    def name(self) -> str:
        if self.recipe is not None:
            return self.recipe.name
        return str((self.manifest.get("recipe") or {}).get("name", self.out.name))

    @property
    def rates(self):
        """The rate table (:class:`~stimforge.grid.RateTable`)."""
        from .grid import RateTable

        if self.recipe is not None:
            return self.recipe.rates()
        return RateTable.from_dict(self.manifest["rate_table"], source=str(self.out / MANIFEST))

    def stim_files(self) -> list[Path]:
        """Every distinct stimulus file, in the order of trials.tsv."""
        return [self.out / f for f in dict.fromkeys(r["stim_file"] for r in self.trial_rows)]

    def _trial_row(self, trial: int | str | None, condition: str | None) -> dict[str, Any]:
        rows = self.trial_rows
        if not rows:
            raise BuildError(f"{self.out}: trials.tsv has no rows")
        if isinstance(trial, str):
            want = trial if trial.endswith(".wav") else f"{trial}.wav"
            hit = [r for r in rows if r["stim_file"] == want or Path(r["stim_file"]).name == want]
            if not hit:
                raise BuildError(f"no stimulus file {trial!r} in {self.out}; e.g. "
                                 f"{Path(rows[0]['stim_file']).stem!r}")
            return hit[0]
        conds = list(dict.fromkeys(r["condition"] for r in rows))
        cond = conds[0] if condition is None else condition
        if cond not in conds:
            raise BuildError(f"condition {cond!r} is not in this build; conditions: {conds}")
        numbers = sorted({int(r["trial"]) for r in rows if r["condition"] == cond})
        t = numbers[0] if trial is None else int(trial)
        hit = [r for r in rows if r["condition"] == cond and int(r["trial"]) == t]
        if not hit:
            raise BuildError(f"condition {cond!r} has no trial {t}; its trials are "
                             f"{numbers[0]}..{numbers[-1]}")
        return hit[0]

    def audio(self, index: int | str = 0) -> tuple[np.ndarray, int]:
        """(samples, sr) of a stimulus file: the index-th distinct one, or one by name."""
        path = (self.out / self._trial_row(index, None)["stim_file"] if isinstance(index, str)
                else self.stim_files()[index])
        x, sr = sf.read(path, dtype="float64")
        return x, sr

    # -- spectra ---------------------------------------------------------------------------
    def spectrum(self, trial: int | str | None = None, *, condition: str | None = None,
                 envelope: str = "broadband") -> dict[str, Any]:
        """Envelope spectrum of one trial's analysed window (the lead-in and silences left out).

        Parameters
        ----------
        trial : int or str, optional
            Trial number within ``condition`` (default: its first), or a stimulus file name
            such as ``"intact_003"``.
        condition : str, optional
            Default: the first condition.
        envelope : {"broadband", "auditory"}
            Broadband Hilbert envelope, or the gammatone (auditory) one, as the check uses.

        Returns
        -------
        dict
            ``freq`` (Hz, shape (n_bins,)), ``amplitude`` (envelope amplitude, same shape),
            ``db_re_neighbours`` (power re the mean of the noise bins around each bin, dB),
            ``stim_file``, ``condition``, ``trial``, ``window`` (s).
        """
        from .envelopes import auditory_envelope, broadband_envelope, choose_env_sr
        from .stats import dft_bins

        if envelope not in ("broadband", "auditory"):
            raise BuildError(f"envelope={envelope!r}: choose 'broadband' or 'auditory'")
        row = self._trial_row(trial, condition)
        rates = self.rates
        x, sr = sf.read(self.out / row["stim_file"], dtype="float64")
        if x.ndim > 1:
            x = x.mean(axis=1)
        a = table_samples(row["analysis_onset"], sr=sr)
        n = table_samples(row["analysis_duration"], sr=sr)
        env_sr = choose_env_sr(rates.rows[0].period)
        make = broadband_envelope if envelope == "broadband" else auditory_envelope
        env = make(x[a:a + n], sr=sr, env_sr=env_sr)
        window = float(rates.window)
        Z = dft_bins(env - env.mean(), sr=env_sr, window=window, n_bins=rates.n_bins_needed())
        amp = np.abs(np.asarray(Z))
        from .verify_report import _db_re_neighbours

        return {"freq": np.arange(amp.size) / window, "amplitude": amp,
                "db_re_neighbours": _db_re_neighbours(amp, top_bin=rates.top_bin),
                "stim_file": row["stim_file"], "condition": row["condition"],
                "trial": row["trial"], "window": window, "envelope": envelope}

    def plot_spectrum(self, trial: int | str | None = None, *, condition: str | None = None,
                      envelope: str = "broadband"):
        """:meth:`spectrum` of one trial as a :class:`matplotlib.figure.Figure`: amplitude
        (top) and dB re neighbours (bottom), every level's rate marked and labelled."""
        from .verify_report import _rate_axis, new_figure

        s = self.spectrum(trial, condition=condition, envelope=envelope)
        fig = new_figure(width_px=760, height_px=420)
        ax0, ax1 = fig.subplots(2, 1, sharex=True)
        f = s["freq"]
        ax0.plot(f[1:], s["amplitude"][1:], color="#24292f", lw=1.1)
        ax1.plot(f[1:], s["db_re_neighbours"][1:], color="#24292f", lw=1.1)
        design = {"levels": [{"name": r.name, "rate": r.rate} for r in self.rates.rows]}
        for ax in (ax0, ax1):
            _rate_axis(ax, design, top_labels=ax is ax0, f_max=float(f[-1]))
        ax0.set_ylabel(f"{envelope} envelope amplitude", fontsize=8)
        ax1.set_ylabel("power, dB re neighbours", fontsize=8)
        ax1.set_xlabel("frequency (Hz, log scale); vertical lines: each level's rate", fontsize=8)
        ax0.set_title(f"{Path(s['stim_file']).name} ({s['condition']}, trial {s['trial']}): "
                      f"the analysed {s['window']:g} s", fontsize=9)
        ax0.tick_params(labelbottom=False)
        return fig

    # -- display ---------------------------------------------------------------------------
    def _shown_path(self) -> str:
        try:
            return Path(os.path.relpath(self.out, Path.cwd())).as_posix() \
                if Path(self.out).is_relative_to(Path.cwd()) else str(self.out)
        except ValueError:  # another drive
            return str(self.out)

    def __repr__(self) -> str:
        n_files = len({r["stim_file"] for r in self.trial_rows})
        verdict = "" if self.check is None else f", acoustic check {self.check.verdict}"
        return (f"<BuildResult {self.name!r}: {n_files} stimulus files in "
                f"{self._shown_path()}{verdict}>")

    def _repr_html_(self) -> str:
        e = html.escape
        rows = "".join(
            f"<tr><td>{e(r.name)}</td><td>{r.units_per_group}</td><td>{r.period:.4g}</td>"
            f"<td>{r.rate:.4g}</td></tr>" for r in self.rates.rows)
        conds: dict[str, set] = {}
        for r in self.trial_rows:
            conds.setdefault(r["condition"], set()).add(r["stim_file"])
        files = "; ".join(f"{e(c)} {len(v)}" for c, v in conds.items())
        check = ""
        if self.check is not None:
            c = self.check
            colour = {"pass": "#1a7f37", "cue": "#cf222e"}.get(getattr(c, "state", ""), "#9a6700")
            check = (f"<p><b style='color:{colour}'>acoustic check: "
                     f"{e(c.verdict)} \u2014 {e(c.verdict_meaning)}</b> "
                     f"({len(self.check.family)} tests); the page: "
                     f"<code>{e(self._shown_path())}/check/check.html</code>, the processing "
                     "report beside it; <code>result.check</code> in Python</p>")
        first = self._first_file()
        src = e(self._link(first))
        return (
            f"<div><b>stimforge build {e(self.name)}</b> in <code>{e(self._shown_path())}</code>"
            f"<p>stimulus files per condition: {files}</p>"
            "<table><tr><th>level</th><th>units</th><th>period (s)</th><th>rate (Hz)</th></tr>"
            f"{rows}</table>{check}"
            f"<p>{e(Path(first).name)} (linked, not embedded): <audio controls preload='none' "
            f"src='{src}'></audio></p><p><i>{e(CAUTION)}</i></p></div>")

    def _first_file(self) -> str:
        """The first trial of the first condition (what to listen to first)."""
        first_cond = self.trial_rows[0]["condition"] if self.trial_rows else None
        rows = [r for r in self.trial_rows if r["condition"] == first_cond]
        return min(rows, key=lambda r: int(r["trial"]))["stim_file"] if rows else ""

    def _link(self, rel: str) -> str:
        """A link to a file of the build as the notebook's server sees it (relative to the
        working folder when the build is inside it)."""
        p = Path(self.out) / rel
        try:
            if p.is_relative_to(Path.cwd()):
                return Path(os.path.relpath(p, Path.cwd())).as_posix()
        except ValueError:  # pragma: no cover - another drive
            pass
        return p.as_uri()


def _frame(rows: list[dict[str, Any]], columns: list[str] | None, what: str):
    try:
        import pandas as pd
    except ImportError:
        rows_hint = (f" (the rows as dicts: result.{what[:-1]}_rows)"
                     if what in ("trials", "units") else "")
        raise BuildError(f"the {what} table as a DataFrame needs pandas: pip install "
                         f"'stimforge[notebook]'{rows_hint}") from None
    df = pd.DataFrame(rows)
    if columns is not None and not df.empty:
        df = df[[c for c in columns if c in df.columns]
                + [c for c in df.columns if c not in columns]]
    return df


def open_build(folder: str | Path) -> BuildResult:
    """Reopen a finished build folder as the :class:`BuildResult` that :func:`build` returned.

    Parameters
    ----------
    folder : path
        A stimforge build folder (``manifest.json``, ``trials.tsv``, ``units.tsv``, and
        ``check/check.json`` if the check ran).

    Returns
    -------
    BuildResult
        Tables, manifest, summary and the check report (read from check.json: verdict, tests
        and sensitivity, but no figures).

    Raises
    ------
    StimforgeError
        If the folder, its manifest or its tables are missing or unreadable.

    Examples
    --------
    >>> import stimforge
    >>> res = stimforge.read_build("build/demo-verse")  # doctest: +SKIP
    >>> res.trials.head()  # doctest: +SKIP
    """
    import json
    import warnings

    from .audio_io import read_build as _read_tables
    from .errors import StimforgeError
    from .recipe import recipe_from_dict
    from .verify_report import CheckReport

    tables = _read_tables(folder)
    root = Path(tables.root).absolute()
    recipe = None
    data = tables.manifest.get("recipe")
    if isinstance(data, dict):
        data = {k: v for k, v in data.items()}
        data["retime"] = {k: v for k, v in (data.get("retime") or {}).items() if v is not None}
        try:
            with warnings.catch_warnings():  # warned at build time; an old build's spelling
                warnings.simplefilter("ignore")  # is not the reader's to fix
                recipe = recipe_from_dict(data, base_dir=root, source=str(root / MANIFEST))
        except StimforgeError as exc:
            log.info("%s: the recorded recipe no longer validates (%s); result.recipe is None",
                     root, str(exc).splitlines()[0])
    check = None
    cpath = root / "check" / "check.json"
    if cpath.is_file():
        try:
            check = CheckReport.from_dict(json.loads(cpath.read_text(encoding="utf-8")),
                                          location=str(root))
        except (OSError, ValueError, KeyError, TypeError) as exc:
            log.warning("%s: not readable as a check report (%s)", cpath, exc)
    spath = root / "summary.txt"
    summary = spath.read_text(encoding="utf-8") if spath.is_file() else ""
    warns = tuple(f"{t.get('token_id')}: {w}" for t in tables.manifest.get("tokens") or ()
                  for w in t.get("warnings") or ())
    return BuildResult(out=root, recipe=recipe, trial_rows=tables.trials,
                       unit_rows=tables.units, manifest=tables.manifest, check=check,
                       summary=summary, warnings=warns)


def build(
    recipe: Recipe | str | Path,
    *,
    out: str | Path | None = None,
    overwrite: bool = False,
    jobs: int | None = None,
    seed: int | None = None,
    progress: bool = True,
    check: bool | None = None,
    allow_large: bool = False,
) -> BuildResult:
    """Build a stimulus set from a recipe into a folder.

    Parameters
    ----------
    recipe : Recipe or path to a YAML recipe
    out : path, optional
        Build folder.  Default: ``<recipe folder>/build/<recipe name>``.
    overwrite : bool
        Allow a non-empty ``out``; only files an earlier stimforge build wrote there (unchanged)
        are replaced.
    jobs : int, optional
        Worker processes for re-timing (overrides ``retime.jobs``); outputs do not depend on it.
    seed : int, optional
        Overrides the recipe's seed.
    progress : bool
        Show progress bars.
    check : bool, optional
        Run the acoustic check (default: the recipe's ``check.run``).
    allow_large : bool
        Build even when :func:`estimate_build` finds the set beyond the sane limits (output
        size, memory, time, table rows); never beyond this machine's memory.

    Returns
    -------
    BuildResult

    Raises
    ------
    StimforgeError
        A bad recipe, corpus or design (``RecipeError``, ``CorpusError``, ``DesignError``...);
        ``BuildError`` for an output folder that may not be used, a set too large to build, or
        a write that failed (full disk, permission).  The output folder is then unchanged.
    """
    if not isinstance(recipe, Recipe):
        recipe = load_recipe(recipe)
    if seed is not None:
        recipe = recipe.model_copy(update={"seed": checked_seed(seed)})
    jobs = None if jobs is None else checked_jobs(jobs)
    run_check = recipe.check.run if check is None else bool(check)
    out = Path(out) if out is not None else recipe.base_dir / "build" / recipe.name
    out = out.absolute()
    rates = recipe.rates()
    size = estimate_build(recipe, check=run_check)
    size.refuse(allow_large=allow_large)  # before anything is read or written
    t0 = time.monotonic()
    logbuf: list[str] = []

    def note(msg: str, level: int = logging.INFO) -> None:
        log.log(level, msg)
        logbuf.append(f"{time.strftime('%Y-%m-%dT%H:%M:%S')} +{time.monotonic() - t0:7.2f}s {msg}")

    tmp = prepare_output(out, overwrite=overwrite)
    try:
        note(f"stimforge {__version__}: building {recipe.name!r} (seed {recipe.seed}) into {out}")
        note(f"estimate: {size.format()}")
        corpus, design, tokens = _corpus_and_design(recipe, rates, note)
        processed = _render_tokens(recipe, corpus, tokens, rates, jobs=jobs, progress=progress,
                                   note=note)
        file_info, units_rows = _assemble_trials(tmp, recipe, design, processed, rates,
                                                 progress=progress)
        trial_rows, codes = _write_tables(tmp, recipe, design, file_info, units_rows)

        summary = _summary(recipe, rates, design, trial_rows, processed, out)
        summary += _warnings_section(processed.warnings)
        summary += ("\ntrigger codes (the value column of trials.tsv; plans and playlists in "
                    "events/):\n" + codes.format() + "\n")
        (tmp / "summary.txt").write_text(summary, encoding="utf-8")

        report = None
        if run_check:
            from .verify import check_build

            note("acoustic check ...")
            # the checker reads only what has been written, as it would for any folder
            _write_manifest(tmp, recipe, rates, corpus, tokens, design, processed, check=None,
                            codes=codes)
            report = check_build(tmp, alpha=recipe.check.alpha,
                                 sensitivity=recipe.check.sensitivity, progress=progress)
            (tmp / "check").mkdir(exist_ok=True)
            report.write_json(tmp / "check" / "check.json")
            report.write_html(tmp / "check")
            note(f"check: {report.summary_line()}")
            summary += f"\nAcoustic check: {report.summary_line()}\n"
            (tmp / "summary.txt").write_text(summary, encoding="utf-8")
        _write_manifest(tmp, recipe, rates, corpus, tokens, design, processed,
                        check=report, codes=codes)
        note(f"done in {time.monotonic() - t0:.1f} s")
        (tmp / LOG).write_text("\n".join(logbuf) + "\n", encoding="utf-8")
        commit_output(tmp, out, overwrite=overwrite)
    except OSError as exc:
        discard_partial(tmp)
        if exc.errno not in _WRITE_ERRNOS:
            raise
        raise BuildError(f"writing the build failed: {exc.strerror or exc}"
                         + (f" ({exc.filename})" if exc.filename else "")
                         + f"; {_WRITE_ERRNOS[exc.errno]}. Nothing was changed in {out}; the "
                         "unfinished files were removed") from exc
    except BaseException:
        discard_partial(tmp)
        raise
    if report is not None:  # it was read in the temporary folder: name the real one
        report = dataclasses.replace(report, location=str(out))
    # the tables as they are on disk, so that read_build(out) gives an equal object
    done = open_build(out)
    return dataclasses.replace(done, recipe=recipe, check=report, summary=summary,
                               warnings=tuple(processed.warnings))


def _corpus_and_design(recipe: Recipe, rates, note: Callable[[str], None]):
    """The corpus at the output rate, the design, and the distinct tokens it uses."""
    from .corpus import load_corpus
    from .design import make_design

    sr = rates.sr
    corpus = load_corpus(recipe.corpus, sr=sr, slot_duration=rates.rows[0].period)
    note(f"corpus: {len(corpus.tokens)} tokens, {len(corpus.labels)} labels at {sr} Hz")
    pool = {lab: [t.id for t in toks] for lab, toks in corpus.by_label().items()}
    design = make_design(recipe, pool, rng=recipe.seed)
    used = sorted({u.token_id for p in design.trials for u in p.units})
    by_id = {t.id: t for t in corpus.tokens}
    tokens = [by_id[i] for i in used]
    note(f"design: {len(design.trials)} trials, {len(design.presentations)} presentations, "
         f"{len(tokens)} distinct tokens")
    return corpus, design, tokens


def _render_tokens(recipe: Recipe, corpus, tokens, rates, *, jobs: int | None, progress: bool,
                   note: Callable[..., None]):
    """Every token re-timed once, at the shorter slot length (see assemble.fit_to_slot)."""
    from .retime import process_tokens

    target = recipe.pitch.target_hz
    if target is None and recipe.pitch.policy != "keep":
        target = corpus.median_f0()
    processed = process_tokens(tokens, sr=rates.sr, n_samples=rates.slot_lengths[0],
                               retime=recipe.retime, pitch=recipe.pitch, level=recipe.loudness,
                               target_f0=target, jobs=jobs, progress=progress)
    # warnings the recipe opted into (out_of_range: warn / cut-pad...) are WARNINGs and go
    # into summary.txt; the first few are shown, all of them are in build.log
    for i, w in enumerate(processed.warnings):
        note(f"re-timing: {w}", logging.WARNING if i < _SHOWN_WARNINGS else logging.DEBUG)
    if len(processed.warnings) > _SHOWN_WARNINGS:
        log.warning("re-timing: %d more warning(s), all listed in summary.txt",
                    len(processed.warnings) - _SHOWN_WARNINGS)
    return processed


def _assemble_trials(tmp: Path, recipe: Recipe, design, processed, rates, *, progress: bool):
    """Write every trial's WAV (one in memory at a time); its trials.tsv facts and units.tsv rows."""
    from tqdm.auto import tqdm

    sr = rates.sr
    (tmp / "stimuli").mkdir()
    _, starts, total = trial_layout(rates)
    file_info: dict[tuple[str, int], dict[str, Any]] = {}
    units_rows: list[dict[str, Any]] = []
    for plan in tqdm(design.trials, desc="assembling", unit="trial", disable=not progress):
        stim_file = f"stimuli/{plan.stem}.wav"
        x = assemble_trial([(u.token_id, u.reversed) for u in plan.units], get=processed.get,
                           rates=rates)
        if np.max(np.abs(x)) > 1.0:
            raise BuildError(f"{stim_file}: a sample exceeds full scale; this is a bug")
        _write_wav(tmp / stim_file, x, sr=sr, subtype=recipe.output.subtype)
        if recipe.events.marker_channel:
            _write_marked(tmp, plan.stem, x, recipe, int(starts[plan.lead_in_units]))
        file_info[(plan.condition, plan.trial)] = {
            "stim_file": stim_file,
            "kind": plan.kind,
            "duration": table_seconds(total, sr=sr),
            "n_units": len(plan.units),
            "lead_in_units": plan.lead_in_units,
            "analysis_onset": table_seconds(starts[plan.lead_in_units], sr=sr),
            "analysis_duration": round(rates.window, 6),
            "lufs": round(_lufs(x, sr), 3),
            "peak_dbfs": round(peak_dbfs(x), 3),
        }
        units_rows.extend(unit_rows(plan, stim_file=stim_file, rates=rates))
    return file_info, units_rows


def _write_tables(tmp: Path, recipe: Recipe, design, file_info, units_rows):
    """trials.tsv (one row per presentation, with its code), units.tsv and the events/ files."""
    trial_rows = []
    for p in design.presentations:
        info = file_info[(p.condition, p.trial)]
        trial_rows.append(
            {"stim_file": info["stim_file"], "condition": p.condition, "kind": info["kind"],
             "trial": p.trial, "repetition": p.repetition, "list": p.list, "order": p.order,
             **{k: info[k] for k in TRIAL_COLUMNS[8:]}}
        )
    codes = _event_codes(recipe, trial_rows)  # the `value` column and events/ files
    trial_rows = assign_values(trial_rows, codes)
    write_tsv(tmp / "trials.tsv", trial_rows, TRIAL_COLUMNS)
    _write_events(tmp, recipe, trial_rows, codes)
    write_tsv(tmp / "units.tsv", units_rows, UNIT_COLUMNS)
    return trial_rows, codes


def _event_codes(recipe: Recipe, trial_rows: list[dict[str, Any]]) -> CodeTable:
    return code_table(trial_rows, conditions=[c.name for c in recipe.conditions],
                      settings=recipe.events)


def _write_events(tmp: Path, recipe: Recipe, trial_rows: list[dict[str, Any]],
                  codes: CodeTable) -> None:
    """Per list: the planned ``events/list-N_events.tsv`` and ``events/list-N_playlist.csv``."""
    folder = tmp / "events"
    folder.mkdir(exist_ok=True)
    marked = {}
    if recipe.events.marker_channel:
        marked = {r["stim_file"]: "stimuli-marker/" + r["stim_file"].split("/", 1)[1]
                  for r in trial_rows}
    for n in sorted({int(r["list"]) for r in trial_rows}):
        rows = plan_list(trial_rows, list_number=n, table=codes, settings=recipe.events,
                         rng=jitter_rng(recipe.seed, n))
        write_tsv(folder / f"list-{n}_events.tsv", rows, EVENT_COLUMNS)
        lines = [",".join(PLAYLIST_COLUMNS)]
        for r in playlist_rows(rows, files=marked):
            lines.append(f"{r['order']},{r['file']},{r['code']},{r['interval']:.3f}")
        (folder / f"list-{n}_playlist.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")


def _write_marked(tmp: Path, stem: str, x: np.ndarray, recipe: Recipe, onset: int) -> None:
    """A stereo copy of a trial: speech left, marker pulses (trial and analysis onset) right."""
    ev = recipe.events
    m = marker_channel(len(x), sr=recipe.output.sample_rate, onsets=[0, onset],
                       pulse=ev.marker_pulse, amplitude=ev.marker_amplitude)
    (tmp / "stimuli-marker").mkdir(exist_ok=True)
    _write_wav(tmp / "stimuli-marker" / f"{stem}.wav", np.column_stack([x, m]),
               sr=recipe.output.sample_rate, subtype=recipe.output.subtype)


def _write_manifest(tmp, recipe, rates, corpus, tokens, design, processed, *, check,
                    codes: CodeTable | None = None) -> dict:
    outputs = output_digests(tmp)
    manifest = {
        "stimforge_version": __version__,
        "recipe": _portable_recipe(recipe),
        "recipe_file": recipe.source.name if recipe.source else None,
        "seed": recipe.seed,
        "rate_table": rates.to_dict(),
        "events": None if codes is None else codes.to_dict(),
        "versions": _versions(),
        "inputs": {t.id: t.sha256 for t in tokens},
        "outputs": outputs,
        "tokens": [r.to_dict() for r in processed.records],
        "pitch_target_hz": processed.target_f0,
        "set_gain_db": processed.set_gain_db,
        "design": design.to_dict(),
        "corpus_qc": [
            {"token": t.id, "label": t.label, "flags": list(t.qc.flags)} for t in corpus.tokens
        ],
        "check": None if check is None else {"passed": check.passed, "summary": check.summary_line()},
        "platform_independent": "no timestamps or absolute paths; see build.log for those",
    }
    # the processing report (check/processing.html) is an output like the others
    from .build_report import write_processing_report

    page = write_processing_report(tmp, manifest=manifest)
    outputs[page.relative_to(tmp).as_posix()] = sha256_file(page)
    (tmp / MANIFEST).write_text(json_dumps(manifest), encoding="utf-8")
    return manifest


def _summary(recipe, rates, design, trial_rows, processed, out) -> str:
    files = sorted({r["stim_file"] for r in trial_rows})
    conds: dict[str, int] = {}
    for p in design.trials:
        conds[p.condition] = conds.get(p.condition, 0) + 1
    total_s = sum(r["duration"] for r in trial_rows if r["list"] == 1)
    lufs = [r["lufs"] for r in trial_rows if r["lufs"] == r["lufs"]]
    lines = [
        f"stimforge {__version__} build of recipe {recipe.name!r} (seed {recipe.seed})",
        f"{len(files)} stimulus files; conditions: "
        + ", ".join(f"{c} ({n} trials)" for c, n in conds.items()),
        f"{recipe.trials.lists} list(s) of {sum(1 for r in trial_rows if r['list'] == 1)} "
        f"presentations, {total_s / 60:.1f} min per list",
        f"trial loudness {min(lufs):.2f} .. {max(lufs):.2f} LUFS (BS.1770)" if lufs else "",
        f"pitch: {recipe.pitch.policy}"
        + (f" at {processed.target_f0:.1f} Hz" if processed.target_f0 else "")
        + f"; loudness: {recipe.loudness.target_dbfs} dBFS RMS per token"
        + (f", whole set lowered {-processed.set_gain_db:.2f} dB by the peak guard"
           if processed.set_gain_db < 0 else ""),
        "",
        rates.format(),
        "",
        design.format_balance(),
        "",
        # the first trial of the first condition (not the alphabetically first file)
        f"listen first to: stimuli/{design.trials[0].stem}.wav (in the build folder)"
        if design.trials else "",
        CAUTION,
    ]
    return "\n".join(lines) + "\n"


class _CallableModule(types.ModuleType):
    """``stimforge.build`` names both this module and its function.  Importing the module
    (``import stimforge.build``) binds the module on the package under that name; calling it
    then still builds, so ``stimforge.build(recipe)`` works whatever was imported first."""

    def __call__(self, *args: Any, **kwargs: Any) -> BuildResult:
        return build(*args, **kwargs)


sys.modules[__name__].__class__ = _CallableModule
