"""Material, conditions and lists: from a recipe to balanced, seeded trial plans.

This stage produces no audio.  It reads the material (a text in the "Material text" format of
the README, or an inventory drawn by :func:`generate_material`), checks every label against the
token pool, builds the trials of every condition from one shared set of unit occurrences, gives
every occurrence a token, and orders the trials into participant lists.  The result is a
:class:`Design`; assembly and export read it.

Design rules (the README explains them for users):

* One *base* sequence of top-level groups is drawn from the material (each group once before
  any reuse).  ``intact`` plays it as written, ``reverse`` plays the same units time-reversed,
  and ``scramble`` cuts it into groups of a level and regroups them, so every condition uses the
  same multiset of labels **and of tokens**: acoustics match across conditions.
* Tokens are assigned once, to the base occurrences: per label, uses per token differ by at
  most one within a condition.
* Every random choice derives from one seed through :class:`numpy.random.SeedSequence` children
  with fixed spawn keys per stage (material, order, tokens, each scramble condition by name,
  each list by number), so adding a list or a condition does not change anything else.
"""

from __future__ import annotations

import hashlib
import logging
import math
import re
import unicodedata
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np

from .errors import DesignError
from .grid import RateTable
from .recipe import GenerateSpec, HierarchySpec, Recipe

__all__ = [
    "Group",
    "UnitRef",
    "TrialPlan",
    "Presentation",
    "Design",
    "LevelUnit",
    "parse_material",
    "generate_material",
    "make_design",
    "level_units",
    "williams_rows",
]

logger = logging.getLogger("stimforge")

#: One top-level group of material: its unit labels in order (length = units per top group).
Group = tuple[str, ...]

# Spawn keys of the random stages (never renumber: that would change every design).
_STAGE_MATERIAL = 0
_STAGE_ORDER = 1
_STAGE_TOKENS = 2
_STAGE_SCRAMBLE = 3
_STAGE_LISTS = 4

_MIN_REPEAT_GAP = 2  # other trials between two hearings of one trial ('spaced'), when possible


# =========================================================================== result types
@dataclass(frozen=True)
class UnitRef:
    """One unit slot of a trial: the label, the token that fills it, and its direction."""

    label: str
    token_id: str
    reversed: bool = False


@dataclass(frozen=True)
class TrialPlan:
    """Everything assembly needs to render one trial file.

    Attributes
    ----------
    condition : str
        Condition name.
    kind : {"intact", "scramble", "reverse"}
    trial : int, >= 1
        Trial number within the condition.
    units : tuple of UnitRef
        Every unit of the file in order; the lead-in group first when there is one.
        Length = ``RateTable.units_per_trial``.
    lead_in_units : int
        Units at the start that form the lead-in (0 if none).
    source_groups : tuple of int
        Indices (0-based) of the material's top-level groups played, lead-in first
        (intact and reverse); empty for scrambles, whose groups are cut and regrouped.
    """

    condition: str
    kind: str
    trial: int
    units: tuple[UnitRef, ...]
    lead_in_units: int
    source_groups: tuple[int, ...]

    @property
    def stem(self) -> str:
        """File stem, e.g. ``intact_001``."""
        return f"{self.condition}_{self.trial:03d}"

    @property
    def labels(self) -> tuple[str, ...]:
        return tuple(u.label for u in self.units)

    @property
    def analysed_units(self) -> tuple[UnitRef, ...]:
        """The units after the lead-in."""
        return self.units[self.lead_in_units :]

    def __repr__(self) -> str:
        head = " ".join(u.label for u in self.units[:8])
        more = " ..." if len(self.units) > 8 else ""
        return (
            f"TrialPlan({self.stem}, {self.kind}, {len(self.units)} units, lead-in "
            f"{self.lead_in_units}: {head}{more})"
        )


@dataclass(frozen=True)
class Presentation:
    """One row of a participant list: which trial plays at which position."""

    list: int
    order: int
    condition: str
    trial: int
    repetition: int = 1

    @property
    def stem(self) -> str:
        return f"{self.condition}_{self.trial:03d}"


@dataclass(frozen=True)
class LevelUnit:
    """One unit of one level inside a trial (a row of ``units.tsv`` without the seconds).

    ``first_unit`` and ``n_units`` count lowest-level units from the trial's first unit; the
    onset in seconds is ``unit_start(first_unit) / sr`` plus the leading silence.
    """

    level: str
    index: int  # 0-based within the file at this level
    position: int  # 1-based within its parent; top level: within the trial (lead-in = 1)
    first_unit: int
    n_units: int
    label: str  # lowest level: the token label; higher: labels joined with "-"
    token: str | None  # lowest level only
    lead_in: bool
    reversed: bool


@dataclass(frozen=True)
class Design:
    """Trial plans of every condition plus the participant lists.

    Attributes
    ----------
    trials : tuple of TrialPlan
        Conditions in recipe order, trials in number order.
    presentations : tuple of Presentation
        Every list in order: list 1 first, then by position.
    label_counts : dict
        condition -> label -> uses in the **analysed part** (lead-in excluded).  The lead-in
        counts are in ``lead_in_label_counts``; both are equal across conditions by construction.
    token_counts : dict
        token id -> uses over all distinct trial files (repeats play the same file and do not
        count again).  Includes 0 for tokens of used labels that were never drawn.
    seed_info : dict
        The seed and the spawn keys of every random stage (goes into the manifest).
    lead_in_label_counts : dict
        condition -> label -> uses in the lead-in groups.
    notes : tuple of str
        Things the user should know (material reuse, best-effort spacing...).
    """

    trials: tuple[TrialPlan, ...]
    presentations: tuple[Presentation, ...]
    label_counts: dict[str, dict[str, int]]
    token_counts: dict[str, int]
    seed_info: dict[str, Any]
    lead_in_label_counts: dict[str, dict[str, int]] = field(default_factory=dict)
    token_labels: dict[str, str] = field(default_factory=dict, repr=False)
    notes: tuple[str, ...] = ()

    def __repr__(self) -> str:
        conds = list(dict.fromkeys(t.condition for t in self.trials))
        lists = len({p.list for p in self.presentations})
        return (
            f"Design({len(conds)} conditions x {len(self.trials) // max(1, len(conds))} trials "
            f"[{', '.join(conds)}], {len(self.presentations)} presentations in {lists} list(s), "
            f"seed {self.seed_info.get('seed')})"
        )

    @property
    def conditions(self) -> list[str]:
        return list(dict.fromkeys(t.condition for t in self.trials))

    def trial(self, condition: str, trial: int) -> TrialPlan:
        """The plan of ``trial`` (1-based) in ``condition``."""
        for t in self.trials:
            if t.condition == condition and t.trial == trial:
                return t
        raise KeyError(f"no trial {trial} in condition {condition!r}")

    def list_presentations(self, number: int) -> list[Presentation]:
        """The presentations of list ``number`` (1-based) in playing order."""
        return [p for p in self.presentations if p.list == number]

    def block_order(self, number: int) -> list[str]:
        """Conditions in the order their blocks play in list ``number``."""
        return list(dict.fromkeys(p.condition for p in self.list_presentations(number)))

    def format_balance(self) -> str:
        """Plain-text report of label and token counts across conditions."""
        conds = self.conditions
        labels = sorted({lab for c in self.label_counts.values() for lab in c})
        w = max([5] + [len(x) for x in labels]) + 2
        cw = [max(8, len(c) + 2) for c in conds]
        out = ["label uses per condition (analysed part, lead-in excluded):"]
        out.append("label".ljust(w) + "".join(c.rjust(k) for c, k in zip(conds, cw)))
        for lab in labels:
            out.append(
                lab.ljust(w)
                + "".join(str(self.label_counts[c].get(lab, 0)).rjust(k) for c, k in zip(conds, cw))
            )
        same = all(self.label_counts[c] == self.label_counts[conds[0]] for c in conds)
        lead_same = all(
            self.lead_in_label_counts.get(c) == self.lead_in_label_counts.get(conds[0])
            for c in conds
        )
        out.append(
            f"equal across conditions: {'yes' if same else 'NO'} (analysed part); "
            f"{'yes' if lead_same else 'NO'} (lead-in)"
        )
        n_cond = max(1, len(conds))
        out.append("token uses (all trial files; every condition uses the same tokens):")
        by_label: dict[str, list[int]] = {}
        for tok, n in self.token_counts.items():
            by_label.setdefault(self.token_labels.get(tok, "?"), []).append(n)
        for lab in sorted(by_label):
            counts = by_label[lab]
            lo, hi = min(counts), max(counts)
            out.append(
                f"  {lab}: {len(counts)} token(s), {lo // n_cond}-{hi // n_cond} uses each per "
                f"condition, {lo}-{hi} in total"
            )
        for note in self.notes:
            out.append(f"note: {note}")
        return "\n".join(out)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able data (for the manifest or a notebook)."""
        return {
            "trials": [
                {
                    "condition": t.condition,
                    "kind": t.kind,
                    "trial": t.trial,
                    "stem": t.stem,
                    "lead_in_units": t.lead_in_units,
                    "source_groups": list(t.source_groups),
                    "units": [
                        {"label": u.label, "token": u.token_id, "reversed": u.reversed}
                        for u in t.units
                    ],
                }
                for t in self.trials
            ],
            "presentations": [
                {
                    "list": p.list,
                    "order": p.order,
                    "condition": p.condition,
                    "trial": p.trial,
                    "repetition": p.repetition,
                }
                for p in self.presentations
            ],
            "label_counts": self.label_counts,
            "lead_in_label_counts": self.lead_in_label_counts,
            "token_counts": self.token_counts,
            "seed_info": self.seed_info,
            "notes": list(self.notes),
        }


# =========================================================================== material text
_TOKEN_RE = re.compile(r"\|+|[^\s|]+")


@dataclass
class _Material:
    groups: list[Group]
    where: list[list[str]]  # per group, per unit: "source:line" or a description
    generated: bool = False


def _plural(name: str, n: int) -> str:
    return name if n == 1 else name + "s"


def _parse(text: str, *, hierarchy: HierarchySpec, source: str) -> _Material:
    names = hierarchy.names  # unit, level 1, level 2, ...
    sizes = [lv.size for lv in hierarchy.levels]
    depth = len(sizes)
    top_units = hierarchy.units_per(names[-1])
    counts = [0] * depth  # elements in the open group of level i+1
    start = [0] * depth  # line where the open group of level i+1 started
    groups: list[Group] = []
    where: list[list[str]] = []
    cur: list[str] = []
    cur_where: list[str] = []
    n_units = 0
    last_line = 0

    def path(i: int) -> str:
        """Name the open group of level i+1 (0-based i), top level first."""
        parts = [f"{names[depth]} {len(groups) + 1}"]
        for j in range(depth - 2, i - 1, -1):
            parts.append(f"{names[j + 1]} {counts[j + 1] + 1}")
        return ", ".join(parts)

    def fail(line: int, i: int, what: str, *, since: bool = True) -> DesignError:
        where = f" (from line {start[i] or line})" if since else ""
        return DesignError(f"{source}:{line}: {path(i)}{where}: {what}")

    def close(k: int, line: int, marker: str) -> None:
        nonlocal cur, cur_where
        for i in range(k):
            n = counts[i]
            if n == 0 and i < k - 1:
                continue  # already closed by an earlier, lower marker
            if n == 0:
                raise fail(
                    line, i, f"marker {marker!r} closes an empty {names[i + 1]}", since=False
                )
            if n != sizes[i]:
                hint = ""
                if n > sizes[i]:
                    hint = f"; a {'|' * (i + 1)!r} marker missing?"
                raise fail(
                    line,
                    i,
                    f"{names[i + 1]} holds {n} {_plural(names[i], n)}, needs {sizes[i]}{hint}",
                )
            counts[i] = 0
            if i + 1 < depth:
                counts[i + 1] += 1
            else:
                groups.append(tuple(cur))
                where.append(cur_where)
                cur, cur_where = [], []

    for lineno, raw in enumerate(text.splitlines(), start=1):
        body = raw.split("#", 1)[0]
        for tok in _TOKEN_RE.findall(body):
            last_line = lineno
            if tok[0] == "|":
                k = len(tok)
                if k > depth:
                    levels = ", ".join(f"{names[j + 1]} ({'|' * (j + 1)})" for j in range(depth))
                    raise DesignError(
                        f"{source}:{lineno}: marker {tok!r} closes level {k}, deeper than the "
                        f"hierarchy, which has {depth} level(s) above the {names[0]}: {levels}"
                    )
                close(k, lineno, tok)
            else:
                for i in range(depth):
                    if all(counts[j] == 0 for j in range(i + 1)):
                        start[i] = lineno  # first unit of a fresh group at level i+1
                counts[0] += 1
                cur.append(tok)
                cur_where.append(f"{source}:{lineno}")
                n_units += 1
    if n_units == 0:
        raise DesignError(
            f"{source}: the material holds no units (empty file or only comments); write units "
            "separated by spaces with '|' markers closing each group"
        )
    if cur:
        if len(cur) >= top_units:
            # a complete last group may omit its final marker; close() names any miscount
            close(depth, last_line, "end of file")
        else:
            # a group that already holds more than its size lacks its closing marker
            over = next((i for i in range(depth) if counts[i] > sizes[i]), None)
            hint = "complete the group or delete it"
            if over is not None:
                hint = (f"its open {names[over + 1]} already holds {counts[over]} "
                        f"{_plural(names[over], counts[over])} but a {names[over + 1]} has "
                        f"{sizes[over]}: a {'|' * (over + 1)!r} marker missing?")
            raise DesignError(
                f"{source}:{last_line}: trailing incomplete group at end of file: "
                f"{path(depth - 1)} "
                f"(from line {start[depth - 1]}) holds {len(cur)} of the {top_units} "
                f"{_plural(names[0], top_units)} a {names[depth]} needs; {hint}"
            )
    return _Material(groups=groups, where=where)


def parse_material(
    text: str, *, hierarchy: HierarchySpec, source: str = "<material>"
) -> list[Group]:
    """Parse material text into top-level groups.

    Format ("Material text" in the README): units separated by whitespace; a marker of k pipe
    characters closes the open group of level k (1 = the first level above the unit) and every
    open group below it; ``#`` starts a comment.  Every group must hold exactly its level's
    ``size`` elements.  The final top-level marker may be left out if the last group is complete.

    Parameters
    ----------
    text : str
        The material.
    hierarchy : HierarchySpec
        Levels and sizes the text must follow.
    source : str
        Name used in error messages (usually the file path).

    Returns
    -------
    list of tuple of str
        One tuple of unit labels per top-level group, in file order.

    Raises
    ------
    DesignError
        ``source:line: group: problem`` for a wrong count at a level, a marker deeper than the
        hierarchy, a marker closing an empty group, a trailing incomplete group or no units.

    Examples
    --------
    >>> from stimforge.recipe import HierarchySpec
    >>> h = HierarchySpec(unit={"name": "syllable", "duration": 0.25},
    ...                   levels=[{"name": "word", "size": 2}, {"name": "line", "size": 2}])
    >>> parse_material("ka mo | ri se ||  tu na | pe lo ||", hierarchy=h)
    [('ka', 'mo', 'ri', 'se'), ('tu', 'na', 'pe', 'lo')]
    """
    return _parse(text, hierarchy=hierarchy, source=source).groups


# =========================================================================== generation
def _feasible(counts: Mapping[Any, int], total: int, forbidden: Any = None) -> bool:
    """Can ``counts`` be arranged with no two equal neighbours and not starting with forbidden?"""
    if total <= 0:
        return True
    m = max(counts.values())
    if 2 * m > total + 1:
        return False
    if forbidden is not None and 2 * counts.get(forbidden, 0) == total + 1:
        return False
    return True


def _balanced_counts(n_items: int, total: int, rng: np.random.Generator) -> list[int]:
    q, r = divmod(total, n_items)
    extra = set(rng.choice(n_items, size=r, replace=False).tolist()) if r else set()
    return [q + (1 if i in extra else 0) for i in range(n_items)]


def _stream(
    n_items: int, total: int, *, no_repeat: bool, rng: np.random.Generator, what: str
) -> list[int]:
    """A sequence of item indices, counts balanced (+-1), optionally no immediate repeats.

    Greedy draw weighted by the remaining counts; a candidate is only taken if the rest stays
    arrangeable, which keeps the greedy from dead ends (so no search is needed).
    """
    counts = dict(enumerate(_balanced_counts(n_items, total, rng)))
    if not no_repeat:
        seq = [i for i, c in counts.items() for _ in range(c)]
        return [int(x) for x in rng.permutation(seq)]
    if not _feasible(counts, total):
        raise DesignError(
            f"material.generate: {total} {what} draws with no_immediate_repeat need at least 2 "
            f"different {what}s (got {n_items}); add {what}s or set no_immediate_repeat: false"
        )
    seq: list[int] = []
    prev = None
    remaining = total
    for _ in range(total):
        cands = []
        for i, c in counts.items():
            if c == 0 or i == prev:
                continue
            counts[i] -= 1
            ok = _feasible(counts, remaining - 1, i)
            counts[i] += 1
            if ok:
                cands.append(i)
        w = np.array([counts[i] for i in cands], dtype=float)
        pick = cands[int(rng.choice(len(cands), p=w / w.sum()))]
        seq.append(pick)
        counts[pick] -= 1
        remaining -= 1
        prev = pick
    return seq


def generate_material(
    gen: GenerateSpec,
    *,
    hierarchy: HierarchySpec,
    n_top_groups: int,
    rng: int | np.random.Generator | None,
) -> list[Group]:
    """Draw material from an inventory.

    Parameters
    ----------
    gen : GenerateSpec
        ``mode: words``: fixed multi-unit words streamed in random order, each word used equally
        often (+-1 where the total does not divide), never the same word twice in a row when
        ``no_immediate_repeat``.  ``mode: units``: random unit draws with balanced counts and,
        when ``no_immediate_repeat``, no identical adjacent units.
    hierarchy : HierarchySpec
    n_top_groups : int, >= 1
        Top-level groups to produce.
    rng : int or numpy.random.Generator or None

    Returns
    -------
    list of tuple of str
        ``n_top_groups`` groups cut from one continuous stream (no repeat across group joins
        either).

    Raises
    ------
    DesignError
        If the constraint cannot be met (e.g. one word and no_immediate_repeat).
    """
    rng = np.random.default_rng(rng)
    if n_top_groups < 1:
        raise DesignError(f"n_top_groups must be >= 1, got {n_top_groups}")
    top = hierarchy.units_per(hierarchy.names[-1])
    if gen.mode == "words":
        words = [tuple(w) for w in (gen.words or [])]
        wl = len(words[0])
        if wl != hierarchy.levels[0].size or top % wl:
            raise DesignError(
                f"material.generate.words have {wl} units each; level "
                f"{hierarchy.levels[0].name!r} has size {hierarchy.levels[0].size}"
            )
        total = n_top_groups * (top // wl)
        seq = _stream(len(words), total, no_repeat=gen.no_immediate_repeat, rng=rng, what="word")
        flat = [lab for i in seq for lab in words[i]]
    else:
        units = list(gen.units or [])
        total = n_top_groups * top
        seq = _stream(len(units), total, no_repeat=gen.no_immediate_repeat, rng=rng, what="unit")
        flat = [units[i] for i in seq]
    return [tuple(flat[g * top : (g + 1) * top]) for g in range(n_top_groups)]


# =========================================================================== helpers
def _child(entropy: int, *key: int) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence(entropy, spawn_key=tuple(key)))


def _name_key(name: str) -> int:
    """A stable integer for a condition name (spawn key independent of condition order)."""
    return int.from_bytes(hashlib.sha256(name.encode("utf-8")).digest()[:4], "big")


def williams_rows(n: int) -> list[list[int]]:
    """Rows of a balanced Latin square (Williams design) over ``n`` treatments.

    For even ``n``: ``n`` rows, each treatment once per position and each ordered pair of
    treatments adjacent exactly once.  For odd ``n``: ``2n`` rows (the cyclic square and its
    mirror); the first ``n`` rows alone are a Latin square.
    """
    if n < 1:
        raise ValueError("n must be >= 1")
    base = [0]
    for j in range(1, n):
        base.append((j + 1) // 2 if j % 2 else n - j // 2)
    rows = [[(b + r) % n for b in base] for r in range(n)]
    if n % 2 and n > 1:
        rows += [row[::-1] for row in rows]
    return rows


def _nfc_labels(
    mat: _Material, pool: Mapping[str, Sequence[str]]
) -> tuple[_Material, dict[str, list[str]]]:
    """Material and corpus labels in composed Unicode (NFC), so that a label typed with a
    decomposed accent ("e" + U+0301) matches the same label typed composed ("\u00e9")."""
    nfc = unicodedata.normalize
    groups = [tuple(nfc("NFC", lab) for lab in g) for g in mat.groups]
    merged: dict[str, list[str]] = {}
    for lab, toks in pool.items():
        merged.setdefault(nfc("NFC", lab), []).extend(toks)
    changed = sorted({lab for g in mat.groups for lab in g if nfc("NFC", lab) != lab}
                     | {lab for lab in pool if nfc("NFC", lab) != lab})
    if changed:
        logger.info("labels are compared in composed Unicode (NFC); %d label(s) written "
                    "decomposed were composed: %s", len(changed),
                    ", ".join(repr(nfc("NFC", lab)) for lab in changed[:5]))
    if groups == mat.groups and len(merged) == len(pool):
        return mat, {lab: list(toks) for lab, toks in pool.items()}
    return _Material(groups=groups, where=mat.where, generated=mat.generated), merged


def _rotation_notes(recipe: Recipe) -> list[str]:
    """With ``trials.rotate_items``: warn about unequal lists and an incomplete rotation."""
    tr = recipe.trials
    n_cond = len(recipe.conditions)
    if not tr.rotate_items or n_cond < 2:
        return []
    notes = []
    if tr.per_condition % n_cond:
        q, r = divmod(tr.per_condition, n_cond)
        sizes = [q + 1] * r + [q] * (n_cond - r)
        lo = max(n_cond, q * n_cond)
        notes.append(
            f"trials.rotate_items: per_condition {tr.per_condition} is not a multiple of the "
            f"{n_cond} conditions, so every list plays {'/'.join(map(str, sizes))} trials of "
            f"its conditions (unbalanced); set per_condition to a multiple of {n_cond} (e.g. "
            f"{lo} or {lo + n_cond}) for equal blocks")
    if tr.lists % n_cond:
        notes.append(
            f"trials.rotate_items: {tr.lists} list(s) over {n_cond} conditions: across the "
            f"lists, each trial is heard in some conditions more often than in others"
            + (f" (in only {tr.lists} of the {n_cond})" if tr.lists < n_cond else "")
            + f"; use a multiple of {n_cond} lists for a full rotation")
    for msg in notes:
        logger.warning(msg)
    return notes


def _check_labels(mat: _Material, pool: Mapping[str, Sequence[str]]) -> None:
    uses: Counter[str] = Counter()
    first: dict[str, str] = {}
    for g, w in zip(mat.groups, mat.where):
        for lab, loc in zip(g, w):
            uses[lab] += 1
            first.setdefault(lab, loc)
    missing = sorted(lab for lab in uses if not pool.get(lab))
    if missing:
        items = "\n".join(
            f"  {lab!r}: {uses[lab]} {_plural('use', uses[lab])}, first at {first[lab]}"
            for lab in missing
        )
        raise DesignError(
            f"{len(missing)} {_plural('label', len(missing))} in the material "
            f"{'has' if len(missing) == 1 else 'have'} no token in the corpus:\n{items}\n"
            "add tokens with these labels to the corpus, or correct the material"
        )


def _base_order(
    n_mat: int, n_needed: int, per_trial: int, *, shuffle: bool, rng: np.random.Generator
) -> list[int]:
    """Material group indices for the base sequence: each once before any reuse."""
    if not shuffle:
        return [i % n_mat for i in range(n_needed)]
    seq: list[int] = []
    while len(seq) < n_needed:
        in_trial = seq[len(seq) - len(seq) % per_trial :]
        best, best_bad = None, None
        for _ in range(20):
            perm = [int(x) for x in rng.permutation(n_mat)]
            head = perm[: per_trial - len(in_trial)]
            bad = len(set(head) & set(in_trial))
            if best_bad is None or bad < best_bad:
                best, best_bad = perm, bad
            if bad == 0:
                break
        seq.extend(best)
    return seq[:n_needed]


def _assign_tokens(
    base: list[list[str]],
    pool: Mapping[str, Sequence[str]],
    *,
    n_conditions: int,
    max_uses: int | None,
    rng: np.random.Generator,
) -> list[list[str]]:
    """A token id for every base occurrence, uses per token within +-1 per label."""
    occ: dict[str, list[tuple[int, int]]] = {}
    for t, labs in enumerate(base):
        for p, lab in enumerate(labs):
            occ.setdefault(lab, []).append((t, p))
    out = [[""] * len(labs) for labs in base]
    problems = []
    for lab in sorted(occ):
        toks = sorted(set(pool[lab]))
        n = len(occ[lab])
        q, r = divmod(n, len(toks))
        worst = (q + (1 if r else 0)) * n_conditions
        if max_uses is not None and worst > max_uses:
            per_cond = max_uses // n_conditions  # allowed uses per token in one condition
            need = math.ceil(n / per_cond) if per_cond else None
            problems.append(
                f"  {lab!r}: {n} uses per condition x {n_conditions} condition(s) over "
                f"{len(toks)} token(s) -> {worst} uses of some token"
                + (f"; needs >= {need} tokens" if need else "; no token count suffices")
            )
            continue
        ids = [i for i in range(len(toks)) for _ in range(q)]
        if r:
            ids += [int(x) for x in rng.choice(len(toks), size=r, replace=False)]
        ids = [int(x) for x in rng.permutation(ids)]
        for (t, p), i in zip(occ[lab], ids):
            out[t][p] = toks[i]
    if problems:
        raise DesignError(
            f"constraints.max_uses_per_token = {max_uses} cannot be met (every condition plays "
            f"the same tokens, so uses per token = condition count x uses per condition):\n"
            + "\n".join(problems)
            + "\nadd tokens for these labels, raise max_uses_per_token, or use fewer trials"
        )
    return out


# =========================================================================== scramble
Chunk = tuple[tuple[str, str], ...]  # ((label, token), ...)


def _scramble_precheck(
    name: str, level: str, pools: list[list[Chunk]], seg_len: list[int], n_trials: int
) -> None:
    """Necessary conditions for no_adjacent_repeat; raise with the numbers if broken."""
    parts = ["lead-in", "analysed part"] if len(pools) == 2 else ["trial"]
    for pool, n, part in zip(pools, seg_len, parts):
        if n < 2 or not pool:
            continue
        N = len(pool)
        if all(len(c) == 1 for c in pool):
            counts = Counter(c[0][0] for c in pool)
            cap = n_trials * math.ceil(n / 2)
            for lab, c in sorted(counts.items()):
                if c > cap:
                    raise DesignError(
                        f"condition {name!r} (scramble at {level!r}): constraints."
                        f"no_adjacent_repeat cannot be met: label {lab!r} fills {c} of the {N} "
                        f"{level} slots of the {part} ({n_trials} trials x {n}); at most "
                        f"ceil({n}/2) = {math.ceil(n / 2)} per trial, {cap} in all, can avoid "
                        "touching each other. Use material with more varied labels or set "
                        "constraints.no_adjacent_repeat: false"
                    )
        else:
            pure = Counter(c[0][0] for c in pool if c[0][0] == c[-1][0])
            cap = n_trials * math.ceil(n / 2)
            for lab, c in sorted(pure.items()):
                # groups that begin and end with lab can never stand side by side
                if c > cap:
                    raise DesignError(
                        f"condition {name!r} (scramble at {level!r}): constraints."
                        f"no_adjacent_repeat cannot be met: {c} of the {N} {level} groups of the "
                        f"{part} begin and end with {lab!r}, so no two may touch; at most "
                        f"ceil({n}/2) = {math.ceil(n / 2)} per trial, {cap} in all ({n_trials} "
                        f"trials x {n}). Set constraints.no_adjacent_repeat: false or vary the "
                        "material"
                    )
            starts = Counter(c[0][0] for c in pool)
            ends = Counter(c[-1][0] for c in pool)
            for lab in sorted(ends):
                # every group ending in lab, unless last in its segment, needs a successor
                # that does not start with lab
                if ends[lab] - n_trials > N - starts.get(lab, 0):
                    raise DesignError(
                        f"condition {name!r} (scramble at {level!r}): constraints."
                        f"no_adjacent_repeat cannot be met: {ends[lab]} of the {N} {level} "
                        f"groups end with {lab!r} and {starts.get(lab, 0)} start with it, so "
                        f"at most {N - starts.get(lab, 0) + n_trials} can be placed without "
                        f"{lab!r} touching itself ({n_trials} trials of {n} groups). Set "
                        "constraints.no_adjacent_repeat: false or vary the material"
                    )


def _weighted_order(keys: list, weights: list[float], rng: np.random.Generator) -> list:
    """Random order, heavier keys earlier on average (weighted sampling without replacement)."""
    if len(keys) < 2:
        return list(keys)
    u = rng.random(len(keys))
    score = np.log(u) / np.asarray(weights, dtype=float)  # Efraimidis-Spirakis keys
    return [keys[i] for i in np.argsort(-score, kind="stable")]


def _deal_chunks(pools: list[list[Chunk]], chosen: list, *, slots: list[int], n_trials: int,
                 rng: np.random.Generator) -> list[list[Chunk]]:
    """Give every chosen label key an actual chunk (its tokens) of that key, in random order."""
    items: list[dict[tuple[str, ...], list[Chunk]]] = []
    for pool in pools:
        dd: dict[tuple[str, ...], list[Chunk]] = {}
        for ch in pool:
            dd.setdefault(tuple(lab for lab, _ in ch), []).append(ch)
        items.append({kk: [v[int(j)] for j in rng.permutation(len(v))] for kk, v in
                      sorted(dd.items())})
    n_slots = len(slots)
    return [[items[slots[s]][chosen[t * n_slots + s]].pop() for s in range(n_slots)]
            for t in range(n_trials)]


def _scramble_failure(name: str, level: str, pools: list[list[Chunk]], *, n_trials: int,
                      max_attempts: int, exhausted_proof: bool) -> DesignError:
    """The error of a scramble no search could arrange, with the label that crowds the edges."""
    all_chunks = [c for p in pools for c in p]
    joins = Counter(c[0][0] for c in all_chunks) + Counter(c[-1][0] for c in all_chunks)
    lab, n = sorted(joins.items(), key=lambda kv: (-kv[1], kv[0]))[0]
    how = (
        "an exhaustive search shows that no arrangement satisfies "
        "constraints.no_adjacent_repeat"
        if exhausted_proof
        else f"no arrangement satisfying constraints.no_adjacent_repeat found in {max_attempts} "
        f"attempt(s) (constraints.max_attempts)"
    )
    return DesignError(
        f"condition {name!r} (scramble at {level!r}): {how}; {len(all_chunks)} {level} groups "
        f"in {n_trials} trial(s), the most frequent label at their edges is {lab!r} ({n} of "
        f"{2 * len(all_chunks)} edges). "
        + ("Vary" if exhausted_proof else "Raise max_attempts, vary")
        + " the material, or set constraints.no_adjacent_repeat: false"
    )


def _scramble(
    *,
    name: str,
    level: str,
    pools: list[list[Chunk]],
    seg_len: list[int],
    n_trials: int,
    parent: int,
    orig_pairs: set[tuple[tuple[str, ...], tuple[str, ...]]],
    no_adjacent: bool,
    max_attempts: int,
    rng: np.random.Generator,
) -> list[list[Chunk]]:
    """Regroup chunks into trials.

    Each attempt is a randomised depth-first search over the slots of all trials (candidates in
    weighted random order, preferred ones first) with a node budget; up to ``max_attempts``
    attempts.  A search that runs out of candidates without hitting its budget has proved the
    task impossible and stops at once.
    """
    if no_adjacent:
        _scramble_precheck(name, level, pools, seg_len, n_trials)
    unit_level = all(len(c) == 1 for p in pools for c in p)
    slots: list[int] = []  # pool index of each slot of a trial
    for pi, n in enumerate(seg_len):
        slots += [pi] * n
    n_slots = len(slots)
    total = n_slots * n_trials
    budget = max(2000, 4 * total)
    base_counts: list[dict[tuple[str, ...], int]] = []
    for pool in pools:
        c = Counter(tuple(lab for lab, _ in ch) for ch in pool)
        base_counts.append(dict(sorted(c.items())))

    def candidates(i: int, chosen: list, counts: list[dict]) -> list:
        s = i % n_slots
        pi = slots[s]
        d = counts[pi]
        prev = chosen[i - 1] if s else None
        keys = [k for k, v in d.items() if v]
        if no_adjacent and prev is not None:
            keys = [k for k in keys if k[0] != prev[-1]]
        if len(keys) < 2:
            return keys
        tiers: list[list] = [[], [], [], []]
        nxt_same = s + 1 < n_slots and slots[s + 1] == pi
        left = sum(d.values())
        guard = no_adjacent and unit_level and left > 1
        if guard:
            vals = sorted(d.values(), reverse=True)
            m1, m2 = vals[0], (vals[1] if len(vals) > 1 else 0)
            n_m1 = vals.count(m1)
        for k in keys:
            bad = 0
            if guard:
                # would the rest of this pool still be arrangeable as one sequence (the
                # _feasible rule, with the maximum updated in O(1))?
                ck = d[k] - 1
                others = m1 if (d[k] < m1 or n_m1 > 1) else m2
                m = max(ck, others)
                if 2 * m > left or (nxt_same and 2 * ck == left):
                    bad = 2
            if prev is not None and (
                (not unit_level and k == prev) or (s % parent and (prev, k) in orig_pairs)
            ):
                bad += 1  # soft: a repeat at this level, or a neighbour pair of the material
            tiers[bad].append(k)
        out = []
        for tier in tiers:
            out += _weighted_order(tier, [d[k] for k in tier], rng)
        return out

    exhausted_proof = False
    for attempt in range(max_attempts):
        counts = [dict(c) for c in base_counts]
        chosen: list = []
        stack: list[list] = []
        nodes = 0
        i = 0
        while 0 <= i < total and nodes < budget:
            if len(stack) == i:
                stack.append(candidates(i, chosen, counts))
            cands = stack[-1]
            if not cands:  # dead end: undo the previous choice
                stack.pop()
                i -= 1
                if i >= 0:
                    k = chosen.pop()
                    counts[slots[i % n_slots]][k] += 1
                continue
            k = cands.pop(0)
            counts[slots[i % n_slots]][k] -= 1
            chosen.append(k)
            i += 1
            nodes += 1
        if i == total:
            if attempt:
                logger.info("condition %r: scramble found on attempt %d", name, attempt + 1)
            return _deal_chunks(pools, chosen, slots=slots, n_trials=n_trials, rng=rng)
        if i < 0:
            exhausted_proof = True
            break
    raise _scramble_failure(name, level, pools, n_trials=n_trials, max_attempts=max_attempts,
                            exhausted_proof=exhausted_proof)


# =========================================================================== lists
def _block(
    trials: list[int], reps: int, placement: str, rng: np.random.Generator, attempts: int
) -> tuple[list[tuple[int, int]], int | None]:
    """Order one condition block: (trial, repetition) pairs, and the smallest spacing used."""
    order = [trials[int(i)] for i in rng.permutation(len(trials))]
    if reps == 0:
        return [(t, 1) for t in order], None
    if placement == "adjacent":
        return [(t, r) for t in order for r in range(1, reps + 2)], 0
    rounds = [order]
    min_gap = None
    m = len(order)
    for _ in range(reps):
        prev = rounds[-1]
        pos_prev = {t: i for i, t in enumerate(prev)}
        best, best_gap = None, -1
        for _ in range(min(attempts, 1000)):
            perm = [prev[int(i)] for i in rng.permutation(m)]
            gap = min((m - 1 - pos_prev[t]) + q for q, t in enumerate(perm))
            if gap > best_gap:
                best, best_gap = perm, gap
            if gap >= _MIN_REPEAT_GAP:
                break
        rounds.append(best)
        min_gap = best_gap if min_gap is None else min(min_gap, best_gap)
    out = [(t, r + 1) for r, rnd in enumerate(rounds) for t in rnd]
    return out, min_gap


# =========================================================================== tiling
def level_units(plan: TrialPlan, *, rates: RateTable) -> list[LevelUnit]:
    """Every unit of every level of a trial, lowest level first (rows for ``units.tsv``).

    Parameters
    ----------
    plan : TrialPlan
    rates : RateTable
        The grid: level names and sizes from the unit upwards.

    Returns
    -------
    list of LevelUnit
        For the lowest level one row per unit (label, token); for each higher level one row per
        group, its label the member labels joined with ``-``.  ``position`` is 1-based within
        the parent group; for the top level within the trial, the lead-in group counting as 1.
    """
    rows: list[LevelUnit] = []
    sizes = rates.levels
    n = len(plan.units)
    for li, row in enumerate(rates.rows):
        name, size = row.name, row.units_per_group
        parent = sizes[li][1] if li < len(sizes) else None
        if n % size:
            raise DesignError(
                f"trial {plan.stem}: {n} units do not tile whole {name}s of {size} units"
            )
        for idx in range(n // size):
            first = idx * size
            us = plan.units[first : first + size]
            rows.append(
                LevelUnit(
                    level=name,
                    index=idx,
                    position=(idx % parent) + 1 if parent else idx + 1,
                    first_unit=first,
                    n_units=size,
                    label=us[0].label if size == 1 else "-".join(u.label for u in us),
                    token=us[0].token_id if size == 1 else None,
                    lead_in=first < plan.lead_in_units,
                    reversed=all(u.reversed for u in us),
                )
            )
    return rows


# =========================================================================== make_design
def read_material_text(path: str | Path) -> str:
    """The text of a material file, as the build reads it (UTF-8, a byte-order mark tolerated).

    Raises
    ------
    DesignError
        File missing or unreadable, naming ``material.text`` and the path.
    """
    path = Path(path)
    try:
        return path.read_text(encoding="utf-8-sig")  # tolerate a BOM
    except FileNotFoundError:
        raise DesignError(f"material.text: material file not found: {path}; check material.text "
                          "(relative to the recipe's folder)") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise DesignError(f"material.text: cannot read {path}: {exc}; save it as UTF-8 "
                          "text") from None


def _load_material(recipe: Recipe, n_needed: int, rng: np.random.Generator) -> _Material:
    spec = recipe.material
    if spec.text is not None:
        path = Path(spec.text)
        return _parse(read_material_text(path), hierarchy=recipe.hierarchy, source=str(path))
    groups = generate_material(
        spec.generate, hierarchy=recipe.hierarchy, n_top_groups=n_needed, rng=rng
    )
    where = [[f"generated group {g + 1}"] * len(grp) for g, grp in enumerate(groups)]
    return _Material(groups=groups, where=where, generated=True)


def _seed_and_entropy(rng: int | np.random.Generator | None, recipe: Recipe) -> tuple[int | None, int]:
    """The seed written into the design's provenance and the entropy every stage derives from."""
    if rng is None:
        return int(recipe.seed), int(recipe.seed)
    if isinstance(rng, np.random.Generator):
        return None, int(rng.integers(0, 2**63))
    return int(rng), int(rng)


def _given_material(material: list[Group], recipe: Recipe) -> _Material:
    """Top-level groups handed to make_design, checked against the top level's size."""
    top_name = recipe.hierarchy.names[-1]
    top_units = recipe.hierarchy.units_per(top_name)
    groups = [tuple(str(x) for x in g) for g in material]
    if not groups:
        raise DesignError("material: the list of groups is empty")
    for i, g in enumerate(groups):
        if len(g) != top_units:
            raise DesignError(
                f"material group {i + 1}: {len(g)} units, a {top_name} needs {top_units}"
            )
    return _Material(
        groups=groups,
        where=[[f"material group {g + 1}"] * top_units for g in range(len(groups))],
        # pre-generated material is a stream: keep its order (see generate_material)
        generated=recipe.material.generate is not None,
    )


def _scrambled_plans(cond: Any, recipe: Recipe, mat: _Material, base_labels: list[list[str]],
                     tokens: list[list[str]], *, lead_units: int,
                     orig_pairs_cache: dict[str, set], rng: np.random.Generator) -> list[TrialPlan]:
    """One scramble condition's trials: the base occurrences' chunks at ``cond.level``
    rearranged (lead-in and analysed part separately), each (label, token) pair kept whole."""
    h = recipe.hierarchy
    n_trials = len(base_labels)
    lead = 1 if lead_units else 0
    level = cond.level
    k = h.units_per(level)
    li = h.names.index(level)
    parent = h.levels[li].size  # chunks per group of the level above
    chunks_lead: list[Chunk] = []
    chunks_main: list[Chunk] = []
    for t in range(n_trials):
        pairs = list(zip(base_labels[t], tokens[t]))
        for s in range(0, len(pairs), k):
            (chunks_lead if s < lead_units else chunks_main).append(tuple(pairs[s : s + k]))
    if level not in orig_pairs_cache:
        op = set()
        pk = parent * k
        for g in mat.groups:
            for s in range(k, len(g), k):
                if s % pk:
                    op.add((tuple(g[s - k : s]), tuple(g[s : s + k])))
        orig_pairs_cache[level] = op
    pools = [chunks_lead, chunks_main] if lead else [chunks_main]
    seg = [lead_units // k, (len(base_labels[0]) - lead_units) // k] if lead else [
        len(base_labels[0]) // k
    ]
    arranged = _scramble(
        name=cond.name,
        level=level,
        pools=pools,
        seg_len=seg,
        n_trials=n_trials,
        parent=parent,
        orig_pairs=orig_pairs_cache[level],
        no_adjacent=recipe.constraints.no_adjacent_repeat,
        max_attempts=recipe.constraints.max_attempts,
        rng=rng,
    )
    return [TrialPlan(cond.name, cond.kind, t + 1,
                      tuple(UnitRef(lab, tok, False) for c in trial for lab, tok in c),
                      lead_units, ())
            for t, trial in enumerate(arranged)]


def _counts(plans: list[TrialPlan], base_labels: list[list[str]], pool: Mapping[str, Sequence[str]]):
    """Label counts per condition (analysed part and lead-in), token uses, token -> label."""
    label_counts: dict[str, dict[str, int]] = {}
    lead_counts: dict[str, dict[str, int]] = {}
    token_counts: dict[str, int] = {}
    token_labels: dict[str, str] = {}
    used = sorted({lab for labs in base_labels for lab in labs})
    for lab in used:
        for tok in sorted(set(pool[lab])):
            token_counts[tok] = 0
            token_labels[tok] = lab
    for p in plans:
        c = label_counts.setdefault(p.condition, {})
        lc = lead_counts.setdefault(p.condition, {})
        for i, u in enumerate(p.units):
            d = lc if i < p.lead_in_units else c
            d[u.label] = d.get(u.label, 0) + 1
            token_counts[u.token_id] = token_counts.get(u.token_id, 0) + 1
    label_counts = {c: dict(sorted(v.items())) for c, v in label_counts.items()}
    lead_counts = {c: dict(sorted(v.items())) for c, v in lead_counts.items()}
    return label_counts, lead_counts, token_counts, token_labels


def _presentations(recipe: Recipe, n_trials: int, entropy: int) -> tuple[list[Presentation], list[int]]:
    """Every list's playing order (Williams square over condition blocks, repeats placed), and
    the gaps between spaced hearings."""
    names = [c.name for c in recipe.conditions]
    rows = williams_rows(len(names))
    rep = recipe.repeat
    rep_conds = set(rep.conditions) if rep else set()
    presentations: list[Presentation] = []
    spacing: list[int] = []
    for li_ in range(1, recipe.trials.lists + 1):
        g = _child(entropy, _STAGE_LISTS, li_)
        pos = 0
        for ci in rows[(li_ - 1) % len(rows)]:
            cname = names[ci]
            reps = rep.times if (rep and cname in rep_conds) else 0
            trial_ids = [
                t for t in range(1, n_trials + 1)
                if not recipe.trials.rotate_items or (t - 1 + li_ - 1) % len(names) == ci
            ]
            if not trial_ids:
                continue
            block, gap = _block(
                trial_ids,
                reps,
                rep.placement if rep else "adjacent",
                g,
                recipe.constraints.max_attempts,
            )
            if gap is not None and rep and rep.placement == "spaced":
                spacing.append(gap)
            for t, r in block:
                pos += 1
                presentations.append(Presentation(li_, pos, cname, t, r))
    return presentations, spacing


def make_design(
    recipe: Recipe,
    pool: Mapping[str, Sequence[str]],
    *,
    rng: int | np.random.Generator | None = None,
    material: list[Group] | None = None,
) -> Design:
    """Turn a recipe and a token pool into trial plans and participant lists.

    Parameters
    ----------
    recipe : Recipe
    pool : mapping of str to sequence of str
        Label -> token ids available for it (from the corpus).
    rng : int or numpy.random.Generator or None
        Seed; ``None`` uses ``recipe.seed``.  A Generator is consumed once for a seed.
    material : list of tuple of str, optional
        Top-level groups to use instead of reading ``recipe.material``.  When the recipe
        generates its material, these are taken as such a stream and kept in order; otherwise
        they are drawn in seeded order like a text's groups.

    Returns
    -------
    Design

    Raises
    ------
    DesignError
        Malformed material; labels without tokens (all listed); constraints that cannot be met
        (with the numbers that make them impossible).
    """
    seed, entropy = _seed_and_entropy(rng, recipe)
    h = recipe.hierarchy
    top_name = h.names[-1]
    top_units = h.units_per(top_name)
    gpt = recipe.groups_per_trial()
    lead = 1 if recipe.trials.lead_in else 0
    per_trial = gpt + lead
    n_trials = recipe.trials.per_condition
    n_needed = n_trials * per_trial
    notes: list[str] = _rotation_notes(recipe)

    # ---- material
    if material is not None:
        mat = _given_material(material, recipe)
    else:
        mat = _load_material(recipe, n_needed, _child(entropy, _STAGE_MATERIAL))
    mat, pool = _nfc_labels(mat, pool)
    _check_labels(mat, pool)

    # ---- base sequence of groups (shared by every condition)
    n_mat = len(mat.groups)
    order = _base_order(
        n_mat, n_needed, per_trial, shuffle=not mat.generated, rng=_child(entropy, _STAGE_ORDER)
    )
    if n_mat < n_needed:
        q, r = divmod(n_needed, n_mat)
        msg = (
            f"the material holds {n_mat} {top_name}s but {n_trials} trials x {per_trial} "
            f"{top_name}s need {n_needed}: each is used {q}"
            + (f" or {q + 1}" if r else "")
            + " times"
        )
        logger.warning(msg)
        notes.append(msg)
    elif n_mat > n_needed:
        logger.info("%d of the %d material %ss are used", n_needed, n_mat, top_name)
    trial_groups = [order[t * per_trial : (t + 1) * per_trial] for t in range(n_trials)]
    base_labels = [[lab for g in tg for lab in mat.groups[g]] for tg in trial_groups]

    # ---- tokens, once, for the base occurrences
    tokens = _assign_tokens(
        base_labels,
        pool,
        n_conditions=len(recipe.conditions),
        max_uses=recipe.constraints.max_uses_per_token,
        rng=_child(entropy, _STAGE_TOKENS),
    )
    lead_units = lead * top_units

    # ---- conditions
    plans: list[TrialPlan] = []
    stage_keys: dict[str, list] = {
        "material": [_STAGE_MATERIAL],
        "order": [_STAGE_ORDER],
        "tokens": [_STAGE_TOKENS],
    }
    orig_pairs_cache: dict[str, set] = {}
    for cond in recipe.conditions:
        if cond.kind in ("intact", "reverse"):
            rev = cond.kind == "reverse"
            for t in range(n_trials):
                units = tuple(
                    UnitRef(lab, tok, rev) for lab, tok in zip(base_labels[t], tokens[t])
                )
                plans.append(
                    TrialPlan(
                        cond.name, cond.kind, t + 1, units, lead_units, tuple(trial_groups[t])
                    )
                )
            continue
        key = [_STAGE_SCRAMBLE, _name_key(cond.name)]
        stage_keys[f"scramble:{cond.name}"] = key
        plans += _scrambled_plans(cond, recipe, mat, base_labels, tokens, lead_units=lead_units,
                                  orig_pairs_cache=orig_pairs_cache, rng=_child(entropy, *key))

    # ---- counts
    label_counts, lead_counts, token_counts, token_labels = _counts(plans, base_labels, pool)

    # ---- lists
    presentations, spacing = _presentations(recipe, n_trials, entropy)
    stage_keys["lists"] = [_STAGE_LISTS, "<list number>"]
    if spacing and min(spacing) < _MIN_REPEAT_GAP:
        msg = (
            f"spaced repeats: with {n_trials} trial(s) per block, some repetitions have only "
            f"{min(spacing)} other trial(s) between hearings (wanted >= {_MIN_REPEAT_GAP})"
        )
        logger.warning(msg)
        notes.append(msg)

    seed_info = {
        "seed": seed,
        "entropy": entropy,
        "bit_generator": "PCG64",
        "spawn_keys": stage_keys,
        "material": (
            "given" if material is not None else ("generated" if mat.generated else "text")
        ),
        "material_groups": n_mat,
        "groups_needed": n_needed,
        "list_design": "Williams balanced Latin square over condition blocks"
        + ("; items rotate: list l plays trial t in condition (t + l) mod C"
           if recipe.trials.rotate_items else ""),
    }
    return Design(
        trials=tuple(plans),
        presentations=tuple(presentations),
        label_counts=label_counts,
        token_counts=token_counts,
        seed_info=seed_info,
        lead_in_label_counts=lead_counts,
        token_labels=token_labels,
        notes=tuple(notes),
    )
