"""The declarative recipe: schema, YAML loading with located errors, and the derived rate table.

A recipe describes one frequency-tagging experiment: the unit (e.g. a syllable) with its slot
duration, the levels that group units (word, line, stanza...), the token corpus, the material,
the conditions, the trial layout, the re-timing / pitch / loudness policies, the output format,
the acoustic-check settings and a seed.  Everything downstream reads a :class:`Recipe`.

Relative paths in a recipe resolve against the folder of the recipe file.
"""

from __future__ import annotations

import difflib
import json
import math
import unicodedata
import warnings
from pathlib import Path
from typing import Annotated, Any, Literal

import yaml
from pydantic import (
    AfterValidator,
    BaseModel,
    ConfigDict,
    Field,
    ValidationError,
    ValidationInfo,
    field_validator,
    model_validator,
)

from .defaults import (ALPHA, MAX_JOBS, ONSET_THRESHOLD_DB, REFERENCE_GAP_MS,
                       REFERENCE_LEVEL_STEP_DB, REFERENCE_PITCH_STEP_ST, TRIM_THRESHOLD_DB)
from .errors import RecipeError
from .events import EventSettings
from .grid import MAX_LEVELS, LevelRate, RateTable, RateWarning, rate_table
from .timing import exact

__all__ = [
    "Recipe",
    "RateTable",
    "LevelRate",
    "load_recipe",
    "recipe_from_dict",
    "rate_table",
    "recipe_json_schema",
    "TEMPLATE",
    "RateWarning",
    "RecipeKeyWarning",
    "LoudnessSpec",
]


class _At(ValueError):
    """A cross-field rule broken at a named field (``loc``), so errors can show its YAML line."""

    def __init__(self, loc: tuple, message: str) -> None:
        super().__init__(message)
        self.loc = tuple(loc)


def _resolve_path(value: Path | None, info: ValidationInfo) -> Path | None:
    if value is None:
        return None
    base = (info.context or {}).get("base_dir")
    value = Path(value).expanduser()
    if base is not None and not value.is_absolute():
        value = Path(base) / value
    return value


RecipePath = Annotated[Path, AfterValidator(_resolve_path)]


# Bounds no real design comes near; they keep absurd values (a 10^9 s trial, a million lists)
# from reaching the arithmetic.  Sizes below them are estimated, and refused beyond sane limits
# unless asked for, by stimforge.build.estimate_build.
MAX_TRIAL_SECONDS = 36000.0  # one trial: 10 hours
MAX_PER_CONDITION = 100000
MAX_LISTS = 10000


class _Model(BaseModel):
    # no inf/nan anywhere: ".inf" for a duration would otherwise reach the arithmetic unnamed
    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)


def _nfc(value: Any) -> Any:
    """Labels in composed Unicode (NFC), so a decomposed "e + accent" matches a composed one."""
    if isinstance(value, str):
        return unicodedata.normalize("NFC", value)
    if isinstance(value, list):
        return [_nfc(v) for v in value]
    return value


Label = Annotated[str, AfterValidator(_nfc)]


# --------------------------------------------------------------------------- hierarchy
class UnitSpec(_Model):
    """The lowest element of the structure (e.g. a syllable) and its fixed slot."""

    name: Label = Field("syllable", min_length=1, description="Name of the unit, e.g. 'syllable'.")
    duration: float = Field(
        ..., gt=0, le=10, description="Slot duration in seconds; every token is fitted to it."
    )


class LevelSpec(_Model):
    """One grouping level above the unit."""

    name: Label = Field(..., min_length=1, description="Name of the level, e.g. 'word', 'line'.")
    size: int = Field(
        ..., ge=2, le=1000, description="Number of elements of the level just below per group."
    )


class HierarchySpec(_Model):
    unit: UnitSpec
    levels: list[LevelSpec] = Field(
        ..., min_length=1, max_length=MAX_LEVELS,
        description=f"Grouping levels from the lowest upwards, 1 to {MAX_LEVELS}.",
    )

    @model_validator(mode="after")
    def _unique_names(self) -> "HierarchySpec":
        names = [self.unit.name] + [lv.name for lv in self.levels]
        dup = sorted({n for n in names if names.count(n) > 1})
        if dup:
            raise ValueError(f"level names must be unique; repeated: {', '.join(dup)}")
        return self

    @property
    def names(self) -> list[str]:
        """Unit name first, then the level names upwards."""
        return [self.unit.name] + [lv.name for lv in self.levels]

    def units_per(self, name: str) -> int:
        """Number of units in one group of level ``name`` (1 for the unit itself)."""
        n = 1
        if name == self.unit.name:
            return 1
        for lv in self.levels:
            n *= lv.size
            if lv.name == name:
                return n
        raise KeyError(name)


# --------------------------------------------------------------------------- corpus
class TrimSpec(_Model):
    threshold_db: float = Field(
        TRIM_THRESHOLD_DB,
        lt=0,
        ge=-120,
        description="Silence threshold in dB relative to the token's own peak (absolute value of "
        "the signal, smoothed over 5 ms).",
    )
    pad: float = Field(0.0, ge=0, le=0.5, description="Seconds kept beyond each trim point.")


class QCSpec(_Model):
    quiet_dbfs: float = Field(-45.0, description="Flag tokens whose RMS (active part) is below this.")
    clip_level: float = Field(
        0.999, gt=0, le=1, description="|sample| at or above this counts as clipped."
    )
    max_clipped_fraction: float = Field(0.0, ge=0, le=1)
    min_voiced_fraction: float = Field(0.05, ge=0, le=1)


class CorpusSpec(_Model):
    """Where the tokens come from: a folder with an index CSV, or a recording + TextGrid tier."""

    index: RecipePath | None = Field(
        None, description="index.csv (columns label, file, ...) or the folder that holds it."
    )
    recording: RecipePath | None = Field(None, description="One long recording (WAV/FLAC).")
    textgrid: RecipePath | None = Field(None, description="TextGrid annotating the recording.")
    tier: str | None = Field(None, description="Interval tier whose labelled intervals are tokens.")
    trim: TrimSpec = TrimSpec()
    qc: QCSpec = QCSpec()

    @model_validator(mode="after")
    def _one_source(self) -> "CorpusSpec":
        tg = [self.recording, self.textgrid, self.tier]
        if self.index is not None and any(v is not None for v in tg):
            raise ValueError("give either 'index' or 'recording' + 'textgrid' + 'tier', not both")
        if self.index is None:
            if not all(v is not None for v in tg):
                raise ValueError(
                    "give 'index' (a corpus folder or its index.csv), or all three of "
                    "'recording', 'textgrid' and 'tier'"
                )
        return self


# --------------------------------------------------------------------------- material
class GenerateSpec(_Model):
    """Material drawn from an inventory instead of a text."""

    mode: Literal["words", "units"] = Field(
        ...,
        description="'words': fixed multi-unit items streamed in random order; "
        "'units': random unit draws from 'units'.",
    )
    words: list[list[Label]] | None = Field(
        None, description="For mode 'words': each item is a list of unit labels."
    )
    units: list[Label] | None = Field(None, description="For mode 'units': the unit labels drawn.")
    no_immediate_repeat: bool = Field(True, description="Never the same item twice in a row.")

    @model_validator(mode="after")
    def _fields_for_mode(self) -> "GenerateSpec":
        if self.mode == "words":
            if not self.words:
                raise ValueError("mode 'words' needs a non-empty 'words' list")
            lens = {len(w) for w in self.words}
            if len(lens) != 1 or 0 in lens:
                raise ValueError(
                    f"every word must have the same number of units, got lengths {sorted(lens)}"
                )
        if self.mode == "units" and not self.units:
            raise ValueError("mode 'units' needs a non-empty 'units' list")
        return self


class MaterialSpec(_Model):
    text: RecipePath | None = Field(
        None, description="Plain-text material file (format in the README: 'Material text')."
    )
    generate: GenerateSpec | None = None

    @model_validator(mode="after")
    def _one(self) -> "MaterialSpec":
        if (self.text is None) == (self.generate is None):
            raise ValueError("give exactly one of 'text' or 'generate'")
        return self


# --------------------------------------------------------------------------- conditions
class ConditionSpec(_Model):
    name: str = Field(..., min_length=1, pattern=r"^[A-Za-z0-9_\-]+$")
    kind: Literal["intact", "scramble", "reverse"] = Field(
        ...,
        description="'intact': the material as written; 'scramble': groups of 'level' drawn from "
        "the pool and regrouped (structure above 'level' broken); 'reverse': intact order, every "
        "token time-reversed.",
    )
    level: str | None = Field(
        None, description="For 'scramble': the unit name or a level name whose groups are kept."
    )


class RepeatSpec(_Model):
    conditions: list[str] = Field(..., min_length=1, description="Conditions whose trials repeat.")
    placement: Literal["adjacent", "spaced"] = Field(
        "spaced", description="'adjacent': right after the original; 'spaced': later in the list."
    )
    times: int = Field(1, ge=1, le=10, description="Extra presentations of each trial.")


class TrialsSpec(_Model):
    groups_per_trial: int | None = Field(
        None, ge=1, description="Top-level groups analysed per trial (whole cycles by construction)."
    )
    duration: float | None = Field(
        None, gt=0, le=MAX_TRIAL_SECONDS, description="Alternative to groups_per_trial: analysed seconds per trial; "
        "must be a whole number of cycles of the slowest level."
    )
    lead_in: bool = Field(True, description="Prepend one extra top-level group, marked lead-in.")
    silence_before: float = Field(0.5, ge=0, le=60, description="Seconds of silence before.")
    silence_after: float = Field(0.5, ge=0, le=60, description="Seconds of silence after.")
    per_condition: int = Field(..., ge=1, le=MAX_PER_CONDITION,
                               description="Trials per condition (before repeats).")
    lists: int = Field(1, ge=1, le=MAX_LISTS,
                       description="Participant lists (counterbalanced, seeded order).")
    rotate_items: bool = Field(
        False,
        description="Latin square over conditions where items rotate: list l plays trial t only "
        "in condition (t + l) mod C, so each list holds every trial number once, in one "
        "condition, and C lists together play every trial in every condition.",
    )

    @model_validator(mode="after")
    def _one_length(self) -> "TrialsSpec":
        if (self.groups_per_trial is None) == (self.duration is None):
            raise ValueError("give exactly one of 'groups_per_trial' or 'duration'")
        return self


class ConstraintsSpec(_Model):
    no_adjacent_repeat: bool = Field(
        True, description="No identical labels in adjacent units (scrambled conditions)."
    )
    max_uses_per_token: int | None = Field(
        None, ge=1, description="Maximum occurrences of any one token file in the whole set."
    )
    max_attempts: int = Field(200, ge=1, le=100000, description="Bound on randomisation retries.")


# --------------------------------------------------------------------------- processing
class RetimeSpec(_Model):
    backend: Literal["world", "cut-pad", "overlap-add"] = "world"
    f0_method: Literal["harvest", "dio"] = Field("harvest", description="WORLD F0 estimator.")
    frame_period: float = Field(5.0, ge=1, le=20, description="WORLD frame period in ms.")
    f0_floor: float = Field(70.0, ge=40, le=400, description="Hz, for analysis.")
    f0_ceil: float = Field(600.0, ge=100, le=2000, description="Hz, for analysis.")
    stretch_range: tuple[float, float] = Field(
        (0.6, 1.7), description="Allowed duration factors (target / token) [low, high]."
    )
    out_of_range: Literal["error", "warn", "cut-pad"] = Field(
        "error", description="What to do with tokens whose factor falls outside stretch_range."
    )
    align: Literal["onset", "steepest-rise"] = "onset"
    align_offset: float = Field(
        0.1, ge=0, le=1, description="For 'steepest-rise': seconds into the slot of the rise."
    )
    onset_threshold_db: float = Field(
        ONSET_THRESHOLD_DB, lt=0, ge=-120,
        description="For 'onset': the acoustic onset is where the envelope first comes within "
        "this many dB of the token's peak.",
    )
    jobs: int = Field(1, ge=1, le=MAX_JOBS, description="Worker processes.")
    cache: bool = True
    cache_dir: RecipePath | None = Field(None, description="Default: the user cache folder.")

    @field_validator("stretch_range")
    @classmethod
    def _range(cls, v: tuple[float, float]) -> tuple[float, float]:
        lo, hi = v
        if not (0 < lo <= 1 <= hi):
            # the value itself is added by the error formatter ("(got [1.7, 0.6])")
            raise ValueError("need 0 < low <= 1 <= high for [low, high]")
        return v

    @model_validator(mode="after")
    def _f0(self) -> "RetimeSpec":
        if self.f0_floor >= self.f0_ceil:
            raise ValueError(f"f0_floor ({self.f0_floor}) must be below f0_ceil ({self.f0_ceil})")
        if self.cache and self.cache_dir is not None:
            # one error here instead of one warning per token when the cache cannot be written
            probe = Path(self.cache_dir)
            while not probe.exists() and probe.parent != probe:
                probe = probe.parent
            if probe.exists() and not probe.is_dir():
                raise _At(("cache_dir",), f"{self.cache_dir}: {probe} is a file, not a folder; "
                          "point cache_dir at a folder (it is made if missing), or remove it")
        return self


class RecipeKeyWarning(FutureWarning):
    """A recipe uses an old spelling that is still read for one release (rename it)."""


def _renamed(old: str, new: str, what: str) -> None:
    warnings.warn(f"recipe: {old} is now {new} ({what}); the old spelling is read for one more "
                  f"release: rename it in the recipe", RecipeKeyWarning, stacklevel=2)


class PitchSpec(_Model):
    policy: Literal["flat", "contour", "keep"] = Field(
        "flat",
        description="'flat': every voiced frame at target_hz; 'contour': keep each token's "
        "contour, move its geometric-mean F0 to target_hz (tone languages); 'keep': untouched. "
        "('level' is the old spelling of 'contour'.)",
    )
    target_hz: float | None = Field(
        None, gt=40, lt=1000, description="Default: median F0 over the corpus."
    )

    @field_validator("policy", mode="before")
    @classmethod
    def _old_policy(cls, v: Any) -> Any:
        if v == "level":
            _renamed("pitch.policy 'level'", "'contour'", "keep the contour, move its height")
            return "contour"
        return v


class LoudnessSpec(_Model):
    """The ``loudness`` section: each token's RMS level, the set-wide peak guard, fades."""

    target_dbfs: float = Field(
        -26.0, le=-3, ge=-80, description="RMS over each token's active part, dB re full scale."
    )
    active_threshold_db: float = Field(
        -30.0, lt=0, ge=-80, description="Active part: envelope above this, dB re token peak."
    )
    peak_ceiling_dbfs: float = Field(-1.0, le=0, description="No sample may exceed this.")
    fade: float = Field(0.01, ge=0.001, le=0.1, description="Raised-cosine fade in/out, seconds.")


#: Old name of :class:`LoudnessSpec` (the section was called ``level``), kept for one release.
LevelSpecPolicy = LoudnessSpec


class OutputSpec(_Model):
    sample_rate: int = Field(44100, ge=8000, le=192000)
    subtype: Literal["PCM_16", "PCM_24", "PCM_32"] = Field(
        "PCM_24", description="WAV subtype (FLOAT is not offered: its PEAK chunk breaks "
        "byte-identical rebuilds)."
    )


class ReferenceCueSpec(_Model):
    """Cue sizes the acoustic check must be able to reveal, at every level, before it vouches
    for a set; otherwise its verdict is INCONCLUSIVE (exit 3) and names what it cannot vouch for."""

    level_step_db: float = Field(REFERENCE_LEVEL_STEP_DB, gt=0, le=20,
                                 description="Loudness step on the first unit of every group, dB.")
    gap_ms: float = Field(REFERENCE_GAP_MS, gt=0, le=1000,
                          description="Silent gap closing every group (its last unit's end), ms.")
    pitch_step_st: float = Field(REFERENCE_PITCH_STEP_ST, gt=0, le=12,
                                 description="Pitch step on the last unit of every group, "
                                 "semitones.")


class CheckSpec(_Model):
    run: bool = Field(True, description="Run the acoustic check at the end of the build.")
    alpha: float = Field(ALPHA, gt=0, lt=0.5, description="Family-wise error rate.")
    sensitivity: bool = Field(True, description="Estimate the smallest detectable planted cues.")
    reference: ReferenceCueSpec = Field(
        ReferenceCueSpec(), description="Reference cue sizes the check must be able to reveal "
        "(also `stimforge check --ref-level-step/--ref-gap/--ref-pitch-step`).")


_EV = EventSettings()  # the defaults of the events section, kept in one place


class EventsSpec(_Model):
    """Trigger codes and the planned presentation (see stimforge/events.py, whose
    :class:`~stimforge.events.EventSettings` holds the defaults)."""

    codes: Literal["condition", "trial"] = Field(
        _EV.codes,
        description="'condition': one code per condition and hearing, 10 x condition number + "
        "hearing (11, 12, 21, ...) when that fits below the reserved codes, else numbered "
        "1, 2, ...; 'trial': one code per distinct presentation, numbered 1, 2, ...",
    )
    table: dict[str, int | list[int]] | None = Field(
        None, description="Explicit codes per condition: one per hearing, or one for all "
        "hearings, e.g. {intact: [11, 12], reversed: 40}; overrides 'codes'.",
    )
    list_start: int | None = Field(_EV.list_start, ge=1, le=255, description="Code sent when a list starts "
                                   "(null: none).")
    list_end: int | None = Field(_EV.list_end, ge=1, le=255, description="Code sent after a list's last "
                                 "trial (null: none).")
    catch: int | None = Field(_EV.catch, ge=1, le=255, description="Code of catch trials (null: none).")
    catch_conditions: list[str] = Field(
        [], description="Conditions whose presentations are catch trials (carry the catch code).")
    iti: float = Field(_EV.iti, ge=0, le=600, description="Seconds of silence between the end of "
                       "one trial file and the start of the next.")
    jitter: float = Field(_EV.jitter, ge=0, le=60, description="Width in seconds of a uniform random "
                          "addition to every pause (seeded by the recipe's seed and the list).")
    marker_channel: bool = Field(
        _EV.marker_channel, description="Also write stereo copies of the trials (stimuli-marker/) whose "
        "second channel has a pulse at the trial onset and at the analysis onset, for "
        "audio-to-trigger converters.",
    )
    marker_pulse: float = Field(_EV.marker_pulse, gt=0, le=0.1, description="Length of a marker pulse, s.")
    marker_amplitude: float = Field(_EV.marker_amplitude, gt=0, le=1, description="Marker pulse amplitude (full "
                                "scale 1).")


class Recipe(_Model):
    """A whole experiment.  Build one with :func:`load_recipe` or :func:`recipe_from_dict`."""

    name: str = Field(..., min_length=1, max_length=120, pattern=r"^[A-Za-z0-9_.\-]+$")
    description: str = ""
    seed: int = Field(..., ge=0, lt=2**63)
    hierarchy: HierarchySpec
    corpus: CorpusSpec
    material: MaterialSpec
    conditions: list[ConditionSpec] = Field(..., min_length=1)
    repeat: RepeatSpec | None = None
    trials: TrialsSpec
    constraints: ConstraintsSpec = ConstraintsSpec()
    retime: RetimeSpec = RetimeSpec()
    pitch: PitchSpec = PitchSpec()
    loudness: LoudnessSpec = LoudnessSpec()
    output: OutputSpec = OutputSpec()
    check: CheckSpec = CheckSpec()
    events: EventsSpec = EventsSpec()

    # Set by load_recipe; excluded from the schema and from dumps.
    source: Path | None = Field(None, exclude=True, json_schema_extra={"hidden": True})

    @model_validator(mode="before")
    @classmethod
    def _old_sections(cls, data: Any) -> Any:
        # the loudness section was called `level` (a word the hierarchy already uses)
        if isinstance(data, dict) and "level" in data:
            if "loudness" in data:
                raise _At(("level",), "give the loudness settings once, under 'loudness' "
                          "('level' is its old name)")
            _renamed("the section 'level'", "'loudness'", "target_dbfs, fade, ...")
            data = {("loudness" if k == "level" else k): v for k, v in data.items()}
        return data

    @property
    def level(self) -> LoudnessSpec:
        """Old name of :attr:`loudness`, kept for one release."""
        return self.loudness

    @field_validator("name")
    @classmethod
    def _folder_name(cls, v: str) -> str:
        # the name is the default build folder's name (build/<name>): "." or ".." would be the
        # recipe's own folder or its parent, a leading dot a hidden folder
        if v.startswith("."):
            raise ValueError("a name starting with a dot cannot name the build folder ('.' and "
                             "'..' would be the recipe's own folder or its parent); start it "
                             "with a letter or digit, e.g. 'my-experiment'")
        return v

    @model_validator(mode="after")
    def _cross(self) -> "Recipe":
        names = [c.name for c in self.conditions]
        dup = sorted({n for n in names if names.count(n) > 1})
        if dup:
            raise _At(("conditions",), f"condition names must be unique; repeated: {', '.join(dup)}")
        levels = self.hierarchy.names
        for i, c in enumerate(self.conditions):
            if c.kind == "scramble":
                if c.level is None:
                    raise _At(("conditions", i), f"condition {c.name!r}: kind 'scramble' needs "
                              f"'level', one of {levels[:-1]}")
                if c.level not in levels[:-1]:
                    # never suggest the top level, which is what is refused here
                    hint = "" if c.level == levels[-1] else _did_you_mean(c.level, levels[:-1])
                    raise _At(("conditions", i, "level"), f"condition {c.name!r}: level "
                              f"{c.level!r} must be one of {levels[:-1]} (the top level cannot be "
                              f"scrambled){hint}")
            elif c.level is not None:
                raise _At(("conditions", i, "level"),
                          f"condition {c.name!r}: 'level' only goes with 'scramble'")
        if self.repeat is not None:
            for n in self.repeat.conditions:
                if n not in names:
                    raise _At(("repeat", "conditions"),
                              f"{n!r} is not a condition{_did_you_mean(n, names)}")
        if self.material.generate is not None and self.material.generate.mode == "words":
            wl = len(self.material.generate.words[0])
            if wl != self.hierarchy.levels[0].size:
                raise _At(("material", "generate", "words"),
                          f"the words have {wl} units each but level "
                          f"{self.hierarchy.levels[0].name!r} has size {self.hierarchy.levels[0].size}")
        self._check_events(names)
        # Integer-cycle rule, checked here so every entry point sees it.
        rt = self.rates()
        self._check_sizes(rt)
        return self

    def _check_sizes(self, rt: "RateTable") -> None:
        """A trial of sane length; a fade that fits the slot (it would otherwise be shortened)."""
        seconds = rt.trial_samples / rt.sr
        if seconds > MAX_TRIAL_SECONDS:
            raise _At(("trials",), f"one trial would last {seconds:.4g} s ({rt.units_per_trial} "
                      f"{self.hierarchy.unit.name}s of {self.hierarchy.unit.duration:g} s plus "
                      f"silences); at most {MAX_TRIAL_SECONDS:g} s are allowed: use fewer "
                      "groups_per_trial, a shorter duration, or fewer or smaller levels")
        slot = rt.slot_lengths[0]
        fade_n = max(2, round(self.loudness.fade * rt.sr))
        if fade_n > max(2, slot // 2):
            raise _At(("loudness", "fade"), f"a {self.loudness.fade:g} s fade in and out does "
                      f"not fit the {self.hierarchy.unit.duration:g} s slot ({slot} samples at "
                      f"{rt.sr} Hz): at most {slot // 2 / rt.sr:.4g} s (half the slot)")

    def _check_events(self, names: list[str]) -> None:
        """The event codes fit an 8-bit port for this design (stimforge.events.code_table)."""
        from .events import code_table

        ev = self.events
        for field_, given in (("table", list(ev.table or {})), ("catch_conditions",
                                                                 ev.catch_conditions)):
            for n in given:
                if n not in names:
                    raise _At(("events", field_), f"{n!r} is not a condition"
                              f"{_did_you_mean(n, names)}")
        times = 1 + (self.repeat.times if self.repeat is not None else 0)
        repeated = set(self.repeat.conditions) if self.repeat is not None else set()
        rows = [{"condition": c, "trial": t, "repetition": h}
                for c in names for t in range(1, self.trials.per_condition + 1)
                for h in range(1, (times if c in repeated else 1) + 1)]
        try:
            code_table(rows, conditions=names, settings=ev)
        except RecipeError as exc:
            raise _At(("events",), str(exc)) from None

    # ------------------------------------------------------------------ derived
    @property
    def base_dir(self) -> Path:
        return self.source.parent if self.source is not None else Path.cwd()

    def groups_per_trial(self) -> int:
        """Top-level groups analysed per trial (excluding the lead-in)."""
        if self.trials.groups_per_trial is not None:
            return self.trials.groups_per_trial
        top = exact(self.hierarchy.unit.duration) * self.hierarchy.units_per(
            self.hierarchy.levels[-1].name
        )
        n = exact(self.trials.duration) / top
        if n.denominator != 1 or n < 1:
            lo = max(1, math.floor(n))
            hi = lo + 1 if lo >= n else math.ceil(n)
            raise _At(
                ("trials", "duration"),
                f"{self.trials.duration} s is not a whole number of cycles of the "
                f"slowest level {self.hierarchy.levels[-1].name!r} ({float(top):g} s); nearest "
                f"valid lengths: {float(lo * top):g} s or {float(hi * top):g} s"
            )
        return int(n)

    def rates(self) -> "RateTable":
        """The rate table at the output sample rate."""
        return rate_table(
            unit_name=self.hierarchy.unit.name,
            unit_duration=self.hierarchy.unit.duration,
            levels=[(lv.name, lv.size) for lv in self.hierarchy.levels],
            sr=self.output.sample_rate,
            n_top_groups=self.groups_per_trial(),
            lead_in=self.trials.lead_in,
            silence_before=self.trials.silence_before,
            silence_after=self.trials.silence_after,
        )

    def to_dict(self) -> dict[str, Any]:
        """The resolved recipe as plain JSON-able data (paths absolute)."""
        return json.loads(self.model_dump_json())


# --------------------------------------------------------------------------- loading
def _did_you_mean(word: str, options: list[str]) -> str:
    close = difflib.get_close_matches(str(word), [str(o) for o in options], n=1, cutoff=0.6)
    return f"; did you mean {close[0]!r}?" if close else ""


# Limits of the YAML reader.  A recipe is a few kB with a dozen levels of nesting; these bounds
# are far above that and far below what would exhaust memory or the interpreter's stack.
MAX_RECIPE_BYTES = 2_000_000
MAX_YAML_DEPTH = 64  # nested mappings / lists
MAX_YAML_NODES = 200_000  # values after every alias is expanded (an "alias bomb" has billions)
MAX_INT_DIGITS = 40  # seeds stay below 2**63 (19 digits)


class _Refused(yaml.MarkedYAMLError):
    """A YAML document the recipe reader will not read (with the line it is about)."""

    def __init__(self, mark: Any, problem: str) -> None:
        super().__init__(problem=problem, problem_mark=mark)


class _RecipeLoader(yaml.SafeLoader):
    """PyYAML's safe loader with the recipe reader's limits.

    Refuses duplicate keys in a mapping (YAML would keep the last one silently), aliases that
    refer to themselves, documents that expand to more than :data:`MAX_YAML_NODES` values,
    nesting deeper than :data:`MAX_YAML_DEPTH` and integers longer than
    :data:`MAX_INT_DIGITS` digits.  Every refusal names its line.
    """

    def __init__(self, stream: str) -> None:
        super().__init__(stream)
        self._depth = 0

    def compose_node(self, parent: Any, index: Any) -> Any:
        if self.check_event(yaml.AliasEvent):
            event = self.peek_event()
            target = self.anchors.get(event.anchor)
            if target is not None and getattr(target, "_sf_size", None) is None:
                raise _Refused(event.start_mark, f"the alias *{event.anchor} refers to a value "
                               "that contains it (a recursive alias); write the value out")
            return super().compose_node(parent, index)
        self._depth += 1
        try:
            if self._depth > MAX_YAML_DEPTH:
                raise _Refused(self.peek_event().start_mark, f"values nested more than "
                               f"{MAX_YAML_DEPTH} levels deep; a recipe needs far fewer")
            node = super().compose_node(parent, index)
        finally:
            self._depth -= 1
        size = 1
        if isinstance(node, yaml.SequenceNode):
            size += sum(c._sf_size for c in node.value)
        elif isinstance(node, yaml.MappingNode):
            size += sum(k._sf_size + v._sf_size for k, v in node.value)
        if size > MAX_YAML_NODES:
            raise _Refused(node.start_mark, f"this value expands to {size} or more values "
                           f"through aliases (*name); at most {MAX_YAML_NODES} are read (an "
                           "alias bomb?); write the values out")
        node._sf_size = size
        return node

    def construct_mapping(self, node: Any, deep: bool = False) -> Any:
        if isinstance(node, yaml.MappingNode):
            seen: dict[Any, int] = {}
            for key_node, _ in node.value:
                if key_node.tag == "tag:yaml.org,2002:merge":
                    continue
                key = self.construct_object(key_node, deep=True)
                try:
                    first = seen.get(key)
                except TypeError:  # an unhashable key: the base class says so
                    break
                line = key_node.start_mark.line + 1
                if first is not None:
                    raise _Refused(key_node.start_mark, f"key {key!r} appears twice in the "
                                   f"same mapping (lines {first} and {line}); YAML would keep "
                                   "only the last one: merge the two or delete one")
                seen[key] = line
        return super().construct_mapping(node, deep=deep)

    def construct_yaml_int(self, node: Any) -> int:
        text = str(node.value).replace("_", "").lstrip("+-")
        if len(text) > MAX_INT_DIGITS:
            raise _Refused(node.start_mark, f"an integer of {len(text)} digits; numbers in a "
                           f"recipe have at most {MAX_INT_DIGITS} (seeds are below 2**63)")
        return super().construct_yaml_int(node)


_RecipeLoader.add_constructor("tag:yaml.org,2002:int", _RecipeLoader.construct_yaml_int)


def _node_lines(root: Any) -> dict[tuple, int]:
    """Map YAML paths (tuples of keys / indices) to 1-based line numbers."""
    out: dict[tuple, int] = {}

    def walk(node: Any, path: tuple) -> None:
        out[path] = node.start_mark.line + 1
        if isinstance(node, yaml.MappingNode):
            for k, v in node.value:
                key = k.value if isinstance(k, yaml.ScalarNode) else repr(k.value)
                out[path + (key, "__key__")] = k.start_mark.line + 1
                walk(v, path + (key,))
        elif isinstance(node, yaml.SequenceNode):
            for i, v in enumerate(node.value):
                walk(v, path + (i,))

    if root is not None:
        walk(root, ())
    return out


def _read_yaml(text: str) -> tuple[Any, dict[tuple, int]]:
    """Parse one YAML document with the recipe reader's limits: (data, line map).

    Raises
    ------
    yaml.YAMLError
        Syntax errors and the refusals of :class:`_RecipeLoader` (``problem_mark`` set).
    """
    loader = _RecipeLoader(text)
    try:
        node = loader.get_single_node()
        data = None if node is None else loader.construct_document(node)
    finally:
        loader.dispose()
    return data, _node_lines(node)


def _model_at(loc: tuple) -> type[BaseModel] | None:
    """The pydantic model class that holds the field at ``loc`` (for did-you-mean)."""
    model: Any = Recipe
    for part in loc[:-1]:
        if isinstance(part, int):
            continue
        if not (isinstance(model, type) and issubclass(model, BaseModel)):
            return None
        f = model.model_fields.get(part)
        if f is None:
            return None
        model = _inner_model(f.annotation)
        if model is None:
            return None
    return model if isinstance(model, type) and issubclass(model, BaseModel) else None


def _inner_model(ann: Any) -> Any:
    import typing

    if isinstance(ann, type) and issubclass(ann, BaseModel):
        return ann
    for a in typing.get_args(ann):
        m = _inner_model(a)
        if m is not None:
            return m
    return None


def _format_errors(exc: ValidationError, *, source: str, lines: dict[tuple, int]) -> str:
    msgs = []
    for err in exc.errors(include_url=False):
        loc = tuple(p for p in err["loc"] if not (isinstance(p, str) and p.startswith("function-")))
        path = ".".join(f"[{p}]" if isinstance(p, int) else str(p) for p in loc).replace(".[", "[")
        path = path or "(top level)"
        rule = (err.get("ctx") or {}).get("error")
        if isinstance(rule, _At):  # a cross-field rule names the field it is about
            loc = tuple(loc) + rule.loc
            path = ".".join(f"[{p}]" if isinstance(p, int) else str(p) for p in loc).replace(".[", "[")
        line = lines.get(loc + ("__key__",)) or lines.get(loc)
        if line is None:
            for cut in range(len(loc) - 1, -1, -1):
                line = lines.get(loc[:cut])
                if line is not None:
                    break
        where = f"{source}:{line}" if line else source
        etype = err["type"]
        if etype == "extra_forbidden":
            model = _model_at(loc)
            options = list(model.model_fields) if model else []
            options = [o for o in options if o != "source"]
            hint = _did_you_mean(loc[-1], options)
            msg = f"unknown key {loc[-1]!r}{hint} (allowed here: {', '.join(options)})"
        elif etype == "missing":
            msg = "required field is missing"
        else:
            msg = err["msg"]
            if msg.startswith("Value error, "):
                msg = msg[len("Value error, ") :]
            if "input" in err and etype != "model_type" and not isinstance(err["input"], dict):
                got = repr(err["input"])
                msg += f" (got {got if len(got) <= 80 else got[:76] + ' ...'})"
            if etype == "string_type" and isinstance(err.get("input"), bool):
                msg += (": YAML reads a bare yes/no/on/off/true/false as a boolean; quote the "
                        "label, e.g. 'no'")
        msgs.append(f"{where}: {path}: {msg}")
    return "\n".join(msgs)


def recipe_from_dict(
    data: dict[str, Any], *, base_dir: str | Path | None = None, source: str = "<recipe>",
    lines: dict[tuple, int] | None = None,
) -> Recipe:
    """Validate a recipe given as a mapping (e.g. from a notebook).

    Raises
    ------
    RecipeError
        With one line per problem: ``source:line: yaml.path: rule (got value)``.
    """
    if not isinstance(data, dict):
        raise RecipeError(f"{source}: a recipe must be a mapping of keys, got {type(data).__name__}")
    ctx = {"base_dir": Path(base_dir) if base_dir is not None else Path.cwd()}
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RateWarning)
            recipe = Recipe.model_validate(data, context=ctx)
    except ValidationError as exc:
        raise RecipeError(_format_errors(exc, source=source, lines=lines or {})) from None
    recipe.rates()  # re-emit rate warnings once, outside the validator
    return recipe


def load_recipe(path: str | Path) -> Recipe:
    """Load and validate a YAML recipe; relative paths resolve against its folder.

    Raises
    ------
    RecipeError
        If the file is missing, is not YAML, or breaks a rule of the schema.
    """
    path = Path(path)
    try:
        if path.is_dir():
            raise RecipeError(f"{path}: is a folder; give the recipe's YAML file")
        size = path.stat().st_size
        if size > MAX_RECIPE_BYTES:
            raise RecipeError(f"{path}: {size} bytes; a recipe is a few kB (at most "
                              f"{MAX_RECIPE_BYTES} bytes are read): is this the right file?")
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise RecipeError(f"{path}: recipe file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise RecipeError(f"{path}: cannot read recipe: {exc}") from None
    try:
        data, lines = _read_yaml(text)
    except _Refused as exc:
        raise RecipeError(f"{path}:{exc.problem_mark.line + 1}: {exc.problem}") from None
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f"{path}:{mark.line + 1}" if mark is not None else str(path)
        problem = getattr(exc, "problem", None) or str(exc)
        raise RecipeError(f"{where}: not valid YAML: {problem}") from None
    except (RecursionError, MemoryError):  # not expected within the limits above
        raise RecipeError(f"{path}: too large or too deeply nested to read as a recipe") from None
    if data is None:
        raise RecipeError(f"{path}: the recipe file is empty")
    recipe = recipe_from_dict(data, base_dir=path.resolve().parent, source=str(path), lines=lines)
    return recipe.model_copy(update={"source": path.resolve()})


def recipe_json_schema() -> dict[str, Any]:
    """JSON Schema of the recipe (draft 2020-12), for editors and validators."""
    schema = Recipe.model_json_schema(mode="validation")
    schema.get("properties", {}).pop("source", None)
    schema["$schema"] = "https://json-schema.org/draft/2020-12/schema"
    schema["title"] = "stimforge recipe"
    return schema


TEMPLATE = """\
# stimforge recipe template.  Relative paths resolve against this file's folder.
# Full reference: README.md, section "Recipe reference".  Editors can complete keys from
# the JSON Schema printed by `stimforge schema`.
name: my-experiment
description: >
  Two-syllable words, two words per line; 250 ms syllables -> 4 / 2 / 1 Hz.
seed: 1                      # every random choice follows from this number

hierarchy:
  unit: {name: syllable, duration: 0.25}   # slot duration in seconds
  levels:                                  # from the lowest group upwards
    - {name: word, size: 2}                # 2 syllables per word
    - {name: line, size: 2}                # 2 words per line

corpus:
  index: tokens/index.csv    # columns: label, file (relative to the CSV), any metadata
  # recording: session.wav   # ... or one long recording cut by a TextGrid tier:
  # textgrid: session.TextGrid
  # tier: syllables
  trim: {threshold_db: -40, pad: 0.0}      # dB below each token's own peak

material:
  text: material.txt         # units separated by spaces, "|" closes a word, "||" a line ...
  # generate: {mode: words, words: [[ba, di], [ku, to]]}

conditions:
  - {name: intact, kind: intact}
  - {name: scrambled, kind: scramble, level: syllable}   # random syllable list
  # - {name: reversed, kind: reverse}

# repeat: {conditions: [intact], placement: spaced}

trials:
  groups_per_trial: 10       # top-level groups analysed per trial
  lead_in: true              # one extra group first, excluded from the analysis
  silence_before: 0.5
  silence_after: 0.5
  per_condition: 10
  lists: 1

retime:
  backend: world             # world | cut-pad | overlap-add
  stretch_range: [0.6, 1.7]
  out_of_range: error        # error | warn | cut-pad
  align: onset               # onset | steepest-rise (then align_offset: 0.1)

pitch: {policy: flat}        # flat | contour (tone languages) | keep
loudness: {target_dbfs: -26, fade: 0.01}   # RMS of each token's active part; fades in seconds
output: {sample_rate: 44100, subtype: PCM_24}
check: {run: true, alpha: 0.01}
"""
