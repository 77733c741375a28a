"""Event codes and presentation plans: which 8-bit code marks which presentation, and when.

Pure functions over the rows of a build's ``trials.tsv`` (no files are read or written here;
:mod:`stimforge.build` writes what they return, :mod:`stimforge.epochs` reads it back).

Codes
-----
Every presentation gets an integer code that fits an 8-bit trigger port, 1-255 (0 is the idle
port).  Three schemes:

``codes: condition`` (default)
    One code per condition and hearing.  Condition ``c`` (1-based, recipe order) heard for the
    ``h``-th time gets ``10 * c + h`` (intact first hearing 11, second hearing 12, the second
    condition 21, ...) when every such code stays below the lowest reserved code (up to 24
    conditions of at most 9 hearings with the default reserved codes); otherwise the pairs are
    numbered 1, 2, 3 ... in the same order, skipping reserved codes.
``codes: trial``
    One code per distinct presentation (condition, trial, hearing), numbered 1, 2, 3 ... in
    recipe-condition, trial, hearing order, skipping reserved codes; refused when there are
    more than the free codes.
``table: {condition: [code of hearing 1, code of hearing 2, ...]}``
    Explicit codes for every condition (one integer means the same code for every hearing).

Reserved codes (defaults): 250 list start, 251 list end, 252 catch trials.  Presentations of a
condition listed in ``catch_conditions`` carry the catch code (the design engine has no catch
trials of its own today; a lab that adds target-detection trials marks their condition so).

Plan
----
Per list, :func:`plan_list` lays the presentations out in time: the list-start code at 0 s,
then for every presentation a pause of ``iti + U(0, jitter)`` seconds (rounded to the
millisecond, drawn from a generator seeded by the recipe's seed and the list number), then the
trial file.  The list-end code follows the end of the last file.  The rows are BIDS-style
``events.tsv`` rows (``onset``, ``duration``, ``trial_type``, ``value``, ``stim_file`` and
stimforge's ``order``, ``repetition``, ``trial``, ``interval``); :func:`playlist_rows` gives the
plain CSV a presentation program loops over (``order,file,code,interval``: wait ``interval``
seconds, send ``code``, play ``file``).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from fractions import Fraction
from typing import Any

import numpy as np

from .errors import RecipeError
from .timing import exact, round_half_up, seconds_to_samples

__all__ = [
    "EVENT_COLUMNS",
    "PLAYLIST_COLUMNS",
    "RESERVED_NAMES",
    "CodeTable",
    "EventSettings",
    "assign_values",
    "code_table",
    "jitter_rng",
    "marker_channel",
    "plan_list",
    "playlist_rows",
]

#: Columns of a list's planned ``events.tsv`` (BIDS names first, then stimforge's own).
EVENT_COLUMNS = ["onset", "duration", "trial_type", "value", "stim_file", "order", "repetition",
                 "trial", "interval"]
#: Columns of the playlist CSV.
PLAYLIST_COLUMNS = ["order", "file", "code", "interval"]
#: The ``trial_type`` of the reserved events.
RESERVED_NAMES = ("list_start", "list_end", "catch")

#: Spawn-key stage of the inter-trial jitter (the design's stages are 0-4; never renumber).
_STAGE_JITTER = 16


@dataclass(frozen=True)
class EventSettings:
    """The recipe's ``events:`` section as plain values (see :mod:`stimforge.events`).

    Attributes
    ----------
    codes : {"condition", "trial"}
        One code per condition and hearing, or one per distinct presentation.
    table : mapping of condition -> list of int, optional
        Explicit codes per condition, one per hearing (overrides ``codes``).
    list_start, list_end, catch : int or None
        Reserved codes (1-255); None sends no such code.
    catch_conditions : tuple of str
        Conditions whose presentations carry the ``catch`` code.
    iti : float, seconds >= 0
        Silence between the end of one trial file and the start of the next.
    jitter : float, seconds >= 0
        Width of a uniform random addition to every pause (0: none).
    marker_channel : bool
        Also write each trial as a stereo WAV whose second channel carries a pulse at the
        trial onset and at the analysis onset.
    marker_pulse : float, seconds
        Length of each marker pulse.
    marker_amplitude : float, 0-1
        Amplitude of the marker pulse (full scale = 1).
    """

    codes: str = "condition"
    table: Mapping[str, Sequence[int]] | None = None
    list_start: int | None = 250
    list_end: int | None = 251
    catch: int | None = 252
    catch_conditions: tuple[str, ...] = ()
    iti: float = 2.0
    jitter: float = 0.0
    marker_channel: bool = False
    marker_pulse: float = 0.005
    marker_amplitude: float = 0.5

    @classmethod
    def from_any(cls, obj: Any) -> EventSettings:
        """From an ``EventSettings``, a mapping, or anything with the same attributes
        (the recipe's pydantic section); None gives the defaults."""
        if obj is None:
            return cls()
        if isinstance(obj, cls):
            return obj
        names = cls.__dataclass_fields__
        if isinstance(obj, Mapping):
            d = {k: v for k, v in obj.items() if k in names}
        else:
            d = {k: getattr(obj, k) for k in names if hasattr(obj, k)}
        if "catch_conditions" in d:
            d["catch_conditions"] = tuple(d["catch_conditions"] or ())
        if d.get("table") is not None:
            d["table"] = {str(k): ([int(v)] if isinstance(v, int) else [int(c) for c in v])
                          for k, v in dict(d["table"]).items()}
        return cls(**d)

    @property
    def reserved(self) -> dict[str, int]:
        """Reserved name -> code, for the codes that are set."""
        out = {"list_start": self.list_start, "list_end": self.list_end, "catch": self.catch}
        return {k: int(v) for k, v in out.items() if v is not None}


@dataclass(frozen=True)
class CodeTable:
    """Which code marks which presentation.

    Attributes
    ----------
    scheme : str
        "condition", "condition (numbered)", "trial" or "table".
    by_key : dict
        ``(condition, repetition)`` -> code (schemes by condition), or
        ``(condition, trial, repetition)`` -> code (scheme "trial").
    reserved : dict of str -> int
        ``list_start`` / ``list_end`` / ``catch`` codes that are set.
    catch_conditions : tuple of str
    """

    scheme: str
    by_key: dict[tuple, int]
    reserved: dict[str, int]
    catch_conditions: tuple[str, ...] = ()
    _meaning: dict[int, str] = field(default_factory=dict, repr=False, compare=False)

    def code_for(self, row: Mapping[str, Any]) -> int:
        """The code of one ``trials.tsv`` row (needs ``condition``, ``trial``, ``repetition``)."""
        cond = str(row["condition"])
        if cond in self.catch_conditions:
            return self.reserved["catch"]
        rep = int(row["repetition"])
        key = (cond, int(row["trial"]), rep) if self.scheme == "trial" else (cond, rep)
        try:
            return self.by_key[key]
        except KeyError:
            raise RecipeError(
                f"events: no code for condition {cond!r}, trial {row['trial']}, hearing {rep}; "
                "give every condition and hearing a code in events.table"
            ) from None

    def meaning(self, code: int) -> str:
        """A short human description of a code ("intact, hearing 1", "list_start", ...)."""
        return self._meaning.get(int(code), f"code {int(code)} (not in the code table)")

    def to_dict(self) -> dict[str, Any]:
        """JSON layout for the manifest: ``{"scheme", "reserved", "codes": [...]}``."""
        rows = []
        for key, code in sorted(self.by_key.items(), key=lambda kv: (kv[1], kv[0])):
            if self.scheme == "trial":
                rows.append({"value": code, "condition": key[0], "trial": key[1],
                             "repetition": key[2]})
            else:
                rows.append({"value": code, "condition": key[0], "repetition": key[1]})
        return {"scheme": self.scheme, "reserved": dict(self.reserved), "codes": rows,
                "catch_conditions": list(self.catch_conditions)}

    def format(self) -> str:
        """A small text table of the codes (for summary.txt)."""
        lines = ["code  meaning"]
        meanings = sorted(self._meaning.items())
        for code, text in meanings[:40]:
            lines.append(f"{code:4d}  {text}")
        if len(meanings) > 40:
            lines.append(f"  ... {len(meanings) - 40} more in manifest.json (events.codes)")
        return "\n".join(lines)


def _check_code(v: Any, where: str) -> int:
    if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or not 1 <= int(v) <= 255:
        raise RecipeError(f"{where}: a code must be an integer 1-255 (an 8-bit port; 0 is the "
                          f"idle port), got {v!r}")
    return int(v)


def code_table(
    trials: Sequence[Mapping[str, Any]],
    *,
    conditions: Sequence[str],
    settings: EventSettings | Mapping[str, Any] | None = None,
) -> CodeTable:
    """Give every presentation of a design its code.

    Parameters
    ----------
    trials : sequence of mapping
        ``trials.tsv`` rows (at least ``condition``, ``trial``, ``repetition``), all lists.
    conditions : sequence of str
        Condition names in recipe order (fixes the numbering).
    settings : EventSettings or mapping, optional
        The recipe's ``events:`` section; defaults when None.

    Returns
    -------
    CodeTable

    Raises
    ------
    RecipeError
        A code outside 1-255, a code used twice, a reserved code used for trials, a condition
        without codes in ``table``, or more distinct presentations than free codes.

    Examples
    --------
    >>> rows = [{"condition": "intact", "trial": 1, "repetition": r} for r in (1, 2)]
    >>> rows += [{"condition": "reversed", "trial": 1, "repetition": 1}]
    >>> t = code_table(rows, conditions=["intact", "reversed"])
    >>> [t.code_for(r) for r in rows]
    [11, 12, 21]
    """
    s = EventSettings.from_any(settings)
    conditions = [str(c) for c in conditions]
    reserved: dict[str, int] = {}
    for name, v in s.reserved.items():
        reserved[name] = _check_code(v, f"events.{name}")
    rv = list(reserved.values())
    if len(set(rv)) != len(rv):
        raise RecipeError(f"events: reserved codes must differ, got {reserved}")
    for c in s.catch_conditions:
        if c not in conditions:
            raise RecipeError(f"events.catch_conditions: {c!r} is not a condition "
                              f"(conditions: {', '.join(conditions)})")
    if s.catch_conditions and "catch" not in reserved:
        raise RecipeError("events.catch_conditions is set but events.catch is null; give the "
                          "catch trials a code")
    if s.iti < 0 or s.jitter < 0:
        raise RecipeError(f"events: iti and jitter are seconds >= 0, got {s.iti}, {s.jitter}")
    coded = [c for c in conditions if c not in s.catch_conditions]
    hearings: dict[str, int] = {c: 0 for c in conditions}
    keys_trial: set[tuple[str, int, int]] = set()
    for r in trials:
        c = str(r["condition"])
        if c not in hearings:
            raise RecipeError(f"events: trials.tsv names condition {c!r}, which is not in the "
                              f"recipe ({', '.join(conditions)})")
        hearings[c] = max(hearings[c], int(r["repetition"]))
        keys_trial.add((c, int(r["trial"]), int(r["repetition"])))
    free = [k for k in range(1, 256) if k not in rv]
    by_key: dict[tuple, int] = {}
    meaning: dict[int, str] = {}
    if s.table is not None:
        scheme = "table"
        for c in s.table:
            if c not in conditions:
                raise RecipeError(f"events.table: {c!r} is not a condition (conditions: "
                                  f"{', '.join(conditions)})")
        for c in coded:
            if c not in s.table:
                raise RecipeError(f"events.table: condition {c!r} has no code; give every "
                                  "condition one code per hearing, e.g. "
                                  f"{c}: [{', '.join(str(10 + h) for h in range(1, hearings[c] + 1))}]")
            given = [_check_code(v, f"events.table.{c}") for v in s.table[c]]
            if len(given) == 1:
                given = given * max(1, hearings[c])
            if len(given) < hearings[c]:
                raise RecipeError(f"events.table.{c}: {len(given)} code(s) for {hearings[c]} "
                                  "hearings; give one per hearing (or one for all)")
            for h in range(1, hearings[c] + 1):
                by_key[(c, h)] = given[h - 1]
    elif s.codes == "condition":
        scheme = "condition"
        pairs = [(c, h) for c in coded for h in range(1, hearings[c] + 1)]
        tens = {(c, h): 10 * (conditions.index(c) + 1) + h for c, h in pairs}
        if all(h <= 9 for _, h in pairs) and all(v < min(rv, default=256) for v in tens.values()):
            by_key = tens
        else:
            scheme = "condition (numbered)"
            if len(pairs) > len(free):
                raise RecipeError(f"events: {len(pairs)} condition x hearing pairs but only "
                                  f"{len(free)} free 8-bit codes")
            by_key = dict(zip(pairs, free))
    elif s.codes == "trial":
        scheme = "trial"
        order = sorted((k for k in keys_trial if k[0] not in s.catch_conditions),
                       key=lambda k: (conditions.index(k[0]), k[1], k[2]))
        if len(order) > len(free):
            raise RecipeError(
                f"events.codes: 'trial' needs {len(order)} distinct codes but an 8-bit port has "
                f"{len(free)} free ones (1-255 less the reserved codes); use codes: condition")
        by_key = dict(zip(order, free))
    else:
        raise RecipeError(f"events.codes: expected 'condition' or 'trial', got {s.codes!r}")
    used: dict[int, tuple] = {}
    for key, code in by_key.items():
        if code in rv:
            name = [n for n, v in reserved.items() if v == code][0]
            raise RecipeError(f"events: code {code} of {key} is the reserved {name} code; "
                              "choose another code or move events." + name)
        if code in used and (scheme != "table" or used[code][0] != key[0]):
            raise RecipeError(f"events: code {code} is used by both {used[code]} and {key}; "
                              "every condition needs its own codes")
        used.setdefault(code, key)
        if scheme == "trial":
            meaning[code] = f"{key[0]} trial {key[1]}, hearing {key[2]}"
        else:
            prev = meaning.get(code)
            text = f"{key[0]}, hearing {key[1]}"
            meaning[code] = text if prev is None else f"{key[0]}, every hearing"
    for name, code in reserved.items():
        meaning[code] = name + (f" ({', '.join(s.catch_conditions)})"
                                if name == "catch" and s.catch_conditions else "")
    return CodeTable(scheme=scheme, by_key=by_key, reserved=reserved,
                     catch_conditions=tuple(s.catch_conditions), _meaning=meaning)


def assign_values(trials: Sequence[Mapping[str, Any]], table: CodeTable) -> list[dict[str, Any]]:
    """Copies of the ``trials.tsv`` rows with their code in a ``value`` column."""
    return [{**r, "value": table.code_for(r)} for r in trials]


def jitter_rng(seed: int, list_number: int) -> np.random.Generator:
    """The generator of one list's inter-trial jitter (recipe seed, own stage, list number)."""
    return np.random.default_rng(
        np.random.SeedSequence(int(seed), spawn_key=(_STAGE_JITTER, int(list_number))))


def _ms(x: float) -> Fraction:
    """Seconds rounded half-up to the millisecond, exact."""
    return Fraction(round_half_up(exact(x) * 1000), 1000)


def plan_list(
    trials: Sequence[Mapping[str, Any]],
    *,
    list_number: int,
    table: CodeTable,
    settings: EventSettings | Mapping[str, Any] | None = None,
    rng: np.random.Generator | int | None = None,
) -> list[dict[str, Any]]:
    """The planned presentation of one list as BIDS-style ``events.tsv`` rows.

    Parameters
    ----------
    trials : sequence of mapping
        ``trials.tsv`` rows (``list``, ``order``, ``stim_file``, ``condition``, ``trial``,
        ``repetition``, ``duration`` in seconds); rows of other lists are ignored.
    list_number : int
    table : CodeTable
    settings : EventSettings or mapping, optional
    rng : Generator or int, optional
        Source of the jitter (see :func:`jitter_rng`); needed only when ``jitter > 0``.

    Returns
    -------
    list of dict
        Columns :data:`EVENT_COLUMNS`.  ``onset`` and ``duration`` in seconds from the
        list-start code; ``interval`` is the pause before the file (seconds, whole ms).
        Reserved events have ``stim_file`` None.
    """
    s = EventSettings.from_any(settings)
    rows = sorted((r for r in trials if int(r["list"]) == int(list_number)),
                  key=lambda r: int(r["order"]))
    if not rows:
        raise RecipeError(f"events: list {list_number} has no presentations")
    if s.jitter > 0:
        if rng is None:
            raise RecipeError("events: a jitter needs a seeded generator (rng)")
        rng = np.random.default_rng(rng)
    out: list[dict[str, Any]] = []
    t = Fraction(0)
    if "list_start" in table.reserved:
        out.append({"onset": 0.0, "duration": 0.0, "trial_type": "list_start",
                    "value": table.reserved["list_start"], "stim_file": None, "order": None,
                    "repetition": None, "trial": None, "interval": None})
    for r in rows:
        pause = _ms(s.iti + (float(rng.uniform(0.0, s.jitter)) if s.jitter > 0 else 0.0))
        t += pause
        dur = exact(float(r["duration"]))
        out.append({"onset": float(t), "duration": float(dur), "trial_type": str(r["condition"]),
                    "value": table.code_for(r), "stim_file": str(r["stim_file"]),
                    "order": int(r["order"]), "repetition": int(r["repetition"]),
                    "trial": int(r["trial"]), "interval": float(pause)})
        t += dur
    if "list_end" in table.reserved:
        out.append({"onset": float(t), "duration": 0.0, "trial_type": "list_end",
                    "value": table.reserved["list_end"], "stim_file": None, "order": None,
                    "repetition": None, "trial": None, "interval": None})
    return out


def playlist_rows(events: Sequence[Mapping[str, Any]], *,
                  files: Mapping[str, str] | None = None) -> list[dict[str, Any]]:
    """The playlist of one list: ``order, file, code, interval`` per presentation.

    Parameters
    ----------
    events : rows of :func:`plan_list`
    files : mapping, optional
        ``stim_file`` -> the file to play instead (e.g. the marker-channel copy).
    """
    out = []
    for e in events:
        if e.get("stim_file") is None:
            continue
        f = str(e["stim_file"])
        out.append({"order": e["order"], "file": (files or {}).get(f, f), "code": e["value"],
                    "interval": e["interval"]})
    return out


def marker_channel(n_samples: int, *, sr: int, onsets: Sequence[int], pulse: float,
                   amplitude: float) -> np.ndarray:
    """A marker channel: rectangular pulses of ``pulse`` seconds at the given samples.

    Parameters
    ----------
    n_samples : int
        Length of the trial file.
    sr : int, Hz
    onsets : sequence of int
        Sample indices of the pulses (the trial onset 0 and the analysis onset).
    pulse : float, seconds > 0
    amplitude : float, 0 < amplitude <= 1 (full scale 1)

    Returns
    -------
    ndarray, shape (n_samples,), float64
    """
    if not (0 < amplitude <= 1) or pulse <= 0:
        raise RecipeError(f"events: marker_amplitude must be in (0, 1] and marker_pulse > 0, "
                          f"got {amplitude}, {pulse}")
    n = max(1, seconds_to_samples(pulse, sr=int(sr)))
    y = np.zeros(int(n_samples))
    for o in onsets:
        if not 0 <= int(o) < n_samples:
            raise RecipeError(f"events: marker at sample {o} outside the {n_samples}-sample file")
        y[int(o):int(o) + n] = amplitude
    return y
