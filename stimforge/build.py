"""`build`: recipe -> corpus -> re-timed tokens -> design -> assembled trials -> files on disk.

This is the orchestration layer; each stage lives in its own module.  Data flows one way:
``recipe`` -> ``corpus`` -> ``retime`` -> ``design`` -> ``assemble`` -> ``export``, and the
acoustic check (``verify``) reads only what export wrote.
"""

from __future__ import annotations

import base64
import html
import io
import logging
import os
import platform
import shutil
import time
from dataclasses import dataclass, field
from importlib import metadata
from pathlib import Path
from typing import Any

import numpy as np
import soundfile as sf

from ._version import __version__
from .acoustics import peak_dbfs
from .assemble import assemble_trial, trial_layout, unit_rows
from .errors import BuildError
from .events import (EVENT_COLUMNS, PLAYLIST_COLUMNS, CodeTable, assign_values, code_table,
                     jitter_rng, marker_channel, plan_list, playlist_rows)
from .export import LOG, MANIFEST, commit_output, json_dumps, prepare_output, sha256_file, write_tsv
from .recipe import Recipe, load_recipe

__all__ = ["build", "BuildResult", "TRIAL_COLUMNS", "UNIT_COLUMNS"]

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


def _lufs(x: np.ndarray, sr: int) -> float:
    import pyloudnorm

    if x.size < int(0.4 * sr) or not np.any(x):
        return float("nan")
    return float(pyloudnorm.Meter(sr).integrated_loudness(x))


@dataclass(frozen=True, repr=False)
class BuildResult:
    """What a build produced: the folder, its tables and the check report.

    Attributes
    ----------
    out : Path
        The build folder.
    trials, units : list of dict
        The rows of trials.tsv and units.tsv (numbers as numbers).
    manifest : dict
        The content of manifest.json.
    check : CheckReport or None
        The acoustic check of the set (None if the recipe turned it off).
    """

    out: Path
    recipe: Recipe
    trials: list[dict[str, Any]]
    units: list[dict[str, Any]]
    manifest: dict[str, Any]
    check: Any = None
    summary: str = ""
    warnings: tuple[str, ...] = field(default_factory=tuple)

    def __repr__(self) -> str:
        n_files = len({r["stim_file"] for r in self.trials})
        verdict = "" if self.check is None else f", check {'passed' if self.check.passed else 'FOUND A CUE'}"
        return f"<BuildResult {self.recipe.name!r}: {n_files} stimulus files in {self.out}{verdict}>"

    @property
    def rates(self):
        return self.recipe.rates()

    def stim_files(self) -> list[Path]:
        return [self.out / f for f in dict.fromkeys(r["stim_file"] for r in self.trials)]

    def audio(self, index: int = 0) -> tuple[np.ndarray, int]:
        """(samples, sr) of the index-th distinct stimulus file."""
        x, sr = sf.read(self.stim_files()[index], dtype="float64")
        return x, sr

    def _repr_html_(self) -> str:
        rt = self.rates
        rows = "".join(
            f"<tr><td>{html.escape(r.name)}</td><td>{r.units_per_group}</td><td>{r.period:.4g}</td>"
            f"<td>{r.rate:.4g}</td><td>{r.bin}</td></tr>"
            for r in rt.rows
        )
        x, sr = self.audio(0)
        buf = io.BytesIO()
        sf.write(buf, x, sr, format="WAV", subtype="PCM_16")
        b64 = base64.b64encode(buf.getvalue()).decode("ascii")
        first = html.escape(str(self.stim_files()[0].name))
        check = ""
        if self.check is not None:
            check = f"<p><b>Acoustic check:</b> {html.escape(self.check.summary_line())}</p>"
        return (
            f"<div><h4>stimforge build {html.escape(self.recipe.name)}</h4>"
            f"<pre>{html.escape(self.summary)}</pre>"
            "<table><tr><th>level</th><th>units</th><th>period (s)</th><th>rate (Hz)</th>"
            f"<th>FFT bin</th></tr>{rows}</table>{check}"
            f"<p>{first}:</p><audio controls src='data:audio/wav;base64,{b64}'></audio>"
            f"<p><i>{html.escape(CAUTION)}</i></p></div>"
        )


def build(
    recipe: Recipe | str | Path,
    *,
    out: str | Path | None = None,
    overwrite: bool = False,
    jobs: int | None = None,
    seed: int | None = None,
    progress: bool = True,
    check: bool | None = None,
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

    Returns
    -------
    BuildResult
    """
    from .corpus import load_corpus
    from .design import make_design
    from .retime import process_tokens

    if not isinstance(recipe, Recipe):
        recipe = load_recipe(recipe)
    if seed is not None:
        recipe = recipe.model_copy(update={"seed": int(seed)})
    run_check = recipe.check.run if check is None else bool(check)
    out = Path(out) if out is not None else recipe.base_dir / "build" / recipe.name
    out = out.absolute()
    rates = recipe.rates()
    sr = rates.sr
    t0 = time.monotonic()
    logbuf: list[str] = []

    def note(msg: str) -> None:
        log.info(msg)
        logbuf.append(f"{time.strftime('%Y-%m-%dT%H:%M:%S')} +{time.monotonic() - t0:7.2f}s {msg}")

    tmp = prepare_output(out, overwrite=overwrite)
    try:
        note(f"stimforge {__version__}: building {recipe.name!r} (seed {recipe.seed}) into {out}")
        corpus = load_corpus(recipe.corpus, sr=sr, slot_duration=rates.rows[0].period)
        note(f"corpus: {len(corpus.tokens)} tokens, {len(corpus.labels)} labels at {sr} Hz")
        pool = {lab: [t.id for t in toks] for lab, toks in corpus.by_label().items()}
        design = make_design(recipe, pool, rng=recipe.seed)
        used = sorted({u.token_id for p in design.trials for u in p.units})
        by_id = {t.id: t for t in corpus.tokens}
        tokens = [by_id[i] for i in used]
        note(f"design: {len(design.trials)} trials, {len(design.presentations)} presentations, "
             f"{len(tokens)} distinct tokens")
        target = recipe.pitch.target_hz
        if target is None and recipe.pitch.policy != "keep":
            target = corpus.median_f0()
        base_n = rates.slot_lengths[0]  # rendered once at the shorter slot (see fit_to_slot)
        processed = process_tokens(tokens, sr=sr, n_samples=base_n, retime=recipe.retime,
                                   pitch=recipe.pitch, level=recipe.level, target_f0=target,
                                   jobs=jobs, progress=progress)
        for w in processed.warnings:
            note(f"re-timing: {w}")

        stim_dir = tmp / "stimuli"
        stim_dir.mkdir()
        _, starts, total = trial_layout(rates)
        file_info: dict[tuple[str, int], dict[str, Any]] = {}
        units_rows: list[dict[str, Any]] = []
        from tqdm.auto import tqdm

        for plan in tqdm(design.trials, desc="assembling", unit="trial", disable=not progress):
            stim_file = f"stimuli/{plan.stem}.wav"
            x = assemble_trial(
                [(u.token_id, u.reversed) for u in plan.units],
                get=processed.get,
                rates=rates,
            )
            if np.max(np.abs(x)) > 1.0:
                raise BuildError(f"{stim_file}: a sample exceeds full scale; this is a bug")
            sf.write(tmp / stim_file, x, sr, subtype=recipe.output.subtype, format="WAV")
            if recipe.events.marker_channel:
                _write_marked(tmp, plan.stem, x, recipe, int(starts[plan.lead_in_units]))
            onset_unit = plan.lead_in_units
            file_info[(plan.condition, plan.trial)] = {
                "stim_file": stim_file,
                "kind": plan.kind,
                "duration": round(total / sr, 6),
                "n_units": len(plan.units),
                "lead_in_units": plan.lead_in_units,
                "analysis_onset": round(int(starts[onset_unit]) / sr, 6),
                "analysis_duration": round(rates.window, 6),
                "lufs": round(_lufs(x, sr), 3),
                "peak_dbfs": round(peak_dbfs(x), 3),
            }
            units_rows.extend(unit_rows(plan, stim_file=stim_file, rates=rates))

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

        summary = _summary(recipe, rates, design, trial_rows, processed, out)
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
        manifest = _write_manifest(tmp, recipe, rates, corpus, tokens, design, processed,
                                   check=report, codes=codes)
        note(f"done in {time.monotonic() - t0:.1f} s")
        (tmp / LOG).write_text("\n".join(logbuf) + "\n", encoding="utf-8")
        commit_output(tmp, out, overwrite=overwrite)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return BuildResult(
        out=out,
        recipe=recipe,
        trials=trial_rows,
        units=units_rows,
        manifest=manifest,
        check=report,
        summary=summary,
        warnings=tuple(processed.warnings),
    )


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
                       pulse=ev.marker_pulse, level=ev.marker_level)
    (tmp / "stimuli-marker").mkdir(exist_ok=True)
    sf.write(tmp / "stimuli-marker" / f"{stem}.wav", np.column_stack([x, m]),
             recipe.output.sample_rate, subtype=recipe.output.subtype, format="WAV")


def _write_manifest(tmp, recipe, rates, corpus, tokens, design, processed, *, check,
                    codes: CodeTable | None = None) -> dict:
    outputs = {
        p.relative_to(tmp).as_posix(): sha256_file(p)
        for p in sorted(tmp.rglob("*"))
        if p.is_file() and p.name not in (MANIFEST, LOG)
    }
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
        + f"; level: {recipe.level.target_dbfs} dBFS RMS per token"
        + (f", whole set lowered {-processed.set_gain_db:.2f} dB by the peak guard"
           if processed.set_gain_db < 0 else ""),
        "",
        rates.format(),
        "",
        design.format_balance(),
        "",
        f"listen first to: {files[0]} (in the build folder)" if files else "",
        CAUTION,
    ]
    return "\n".join(lines) + "\n"
