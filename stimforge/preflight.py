"""Pre-flight: every check a build can make before any re-timing (``stimforge build --dry-run``).

In a second or so, and without writing anything, :func:`preflight` runs what a build would
find out only later: the recipe validates, the output folder may be used, the corpus loads
(every file is read and trimmed, so a missing or broken file shows here), the material
parses, every label of the material has tokens, the design can be made (constraints, lists,
rotation and balance: the same seeded code as the build), every token's stretch factor is
within ``retime.stretch_range`` and the backend's limits, and the set is within the size
limits.  Each finding names what is wrong and what would fix it; all of them are listed, so
one problem does not hide the next.

Data flow: this module uses the build's own stages (corpus, design, the re-timing planner and
the size estimate) and adds no rule of its own, so a dry run and a build cannot disagree.
"""

from __future__ import annotations

import html
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .errors import StimforgeError

__all__ = ["Finding", "PreflightReport", "preflight", "CHECKS"]

#: The checks, in the order they run.
CHECKS = ("recipe", "output", "corpus", "material", "labels", "design", "stretch", "size")


@dataclass(frozen=True)
class Finding:
    """One pre-flight check.

    Attributes
    ----------
    check : str
        One of :data:`CHECKS`.
    status : {"ok", "problem", "skipped"}
        ``skipped``: it needs an earlier check that failed.
    message : str
        What was found (and, for a problem, what would fix it).
    """

    check: str
    status: str
    message: str


@dataclass(frozen=True, repr=False)
class PreflightReport:
    """What :func:`preflight` found; ``ok`` when no check found a problem."""

    recipe_name: str
    findings: tuple[Finding, ...]
    seconds: float

    @property
    def ok(self) -> bool:
        return not self.problems

    @property
    def problems(self) -> list[Finding]:
        return [f for f in self.findings if f.status == "problem"]

    def finding(self, check: str) -> Finding | None:
        """The finding of one check (None if it did not run)."""
        return next((f for f in self.findings if f.check == check), None)

    def format(self) -> str:
        """The terminal text: one line per check, then the verdict."""
        w = max(len(c) for c in CHECKS)
        lines = [f"dry run of {self.recipe_name} (no re-timing; nothing written):"]
        for f in self.findings:
            status = f.status.upper() if f.status == "problem" else f.status
            head = f"  {status:<8} {f.check:<{w}}  "
            body = f.message.splitlines() or [""]
            lines.append(head + body[0])
            lines += [" " * len(head) + b for b in body[1:]]
        if self.ok:
            lines.append(f"dry run: no problem found in {self.seconds:.2f} s; run the same "
                         "command without --dry-run to build the set")
        else:
            n = len(self.problems)
            lines.append(f"dry run: {n} problem{'s' if n != 1 else ''} found in "
                         f"{self.seconds:.2f} s ({', '.join(f.check for f in self.problems)}); "
                         "fix them, then build")
        return "\n".join(lines)

    def to_dict(self) -> dict[str, Any]:
        return {"recipe": self.recipe_name, "ok": self.ok, "seconds": self.seconds,
                "findings": [{"check": f.check, "status": f.status, "message": f.message}
                             for f in self.findings]}

    def __repr__(self) -> str:
        return (f"<PreflightReport {self.recipe_name!r}: "
                + ("ok" if self.ok else f"{len(self.problems)} problem(s): "
                   + ", ".join(f.check for f in self.problems)) + ">")

    def _repr_html_(self) -> str:
        e = html.escape
        rows = "".join(
            f"<tr style='background:{'#ffebe9' if f.status == 'problem' else 'none'}'>"
            f"<td>{e(f.status)}</td><td>{e(f.check)}</td><td style='white-space:pre-wrap'>"
            f"{e(f.message)}</td></tr>" for f in self.findings)
        head = ("no problem found" if self.ok else f"{len(self.problems)} problem(s) found")
        return (f"<div><b>dry run of {e(self.recipe_name)}: {e(head)}</b> ({self.seconds:.2f} s)"
                "<table><tr><th>status</th><th>check</th><th>finding</th></tr>"
                f"{rows}</table></div>")


def _first_line(exc: BaseException, limit: int = 40) -> str:
    lines = str(exc).splitlines()
    return "\n".join(lines[:limit]) + (f"\n... ({len(lines) - limit} more lines)"
                                       if len(lines) > limit else "")


def _shown(path: Path) -> str:
    """A path relative to the working folder when it is inside it."""
    try:
        return path.relative_to(Path.cwd()).as_posix()
    except ValueError:
        return str(path)


def _output_finding(out: Path, *, overwrite: bool) -> Finding:
    shown = _shown(out)
    if out.exists() and not out.is_dir():
        return Finding("output", "problem", f"{shown} exists and is not a folder; choose "
                       "another --out")
    if out.is_dir() and any(out.iterdir()):
        if not overwrite:
            return Finding("output", "problem", f"{shown} is not empty; choose a new --out, or "
                           "pass --overwrite to replace an earlier stimforge build there")
        return Finding("output", "ok", f"{shown}: an earlier build there will be replaced "
                       "(--overwrite; files that are not its own are never touched)")
    return Finding("output", "ok", f"{shown}: " + ("an empty folder" if out.is_dir()
                                                  else "a new folder"))


def preflight(recipe: Any, *, out: str | Path | None = None, overwrite: bool = False,
              seed: int | None = None, check: bool | None = None,
              allow_large: bool = False) -> PreflightReport:
    """Run every check of a build that needs no re-timing; write nothing.

    Parameters
    ----------
    recipe : Recipe or path to a YAML recipe
    out : path, optional
        The build folder the build would write (default as :func:`stimforge.build`).
    overwrite : bool
        As the build's ``overwrite``.
    seed : int, optional
        Overrides the recipe's seed (the design depends on it).
    check : bool, optional
        Whether the build would run the acoustic check (for the time estimate).
    allow_large : bool
        As the build's ``allow_large``: a set beyond the usual size limits is not a problem.

    Returns
    -------
    PreflightReport
        One :class:`Finding` per check in :data:`CHECKS`; problems never raise.

    Examples
    --------
    >>> from stimforge.preflight import preflight
    >>> rep = preflight("recipes/demo.yaml")  # doctest: +SKIP
    >>> rep.ok, rep.finding("stretch").message  # doctest: +SKIP
    """
    from .recipe import Recipe, load_recipe

    t0 = time.perf_counter()
    found: list[Finding] = []

    def done(name: str) -> PreflightReport:
        have = {f.check for f in found}
        found.extend(Finding(c, "skipped", "needs the checks above") for c in CHECKS
                     if c not in have)
        return PreflightReport(recipe_name=name, findings=tuple(found),
                               seconds=time.perf_counter() - t0)

    # ---- recipe
    try:
        if not isinstance(recipe, Recipe):
            recipe = load_recipe(recipe)
        if seed is not None:
            from .build import checked_seed

            recipe = recipe.model_copy(update={"seed": checked_seed(seed)})
        rates = recipe.rates()
    except StimforgeError as exc:
        found.append(Finding("recipe", "problem", _first_line(exc)))
        return done(str(getattr(recipe, "name", recipe)))
    found.append(Finding("recipe", "ok", f"valid: {len(recipe.conditions)} conditions; "
                         + ", ".join(f"{r.name} {r.rate:g} Hz" for r in rates.rows)
                         + f"; {rates.window:g} s analysed per trial"))

    # ---- output folder
    dest = Path(out) if out is not None else recipe.base_dir / "build" / recipe.name
    found.append(_output_finding(dest.absolute(), overwrite=overwrite))

    # ---- corpus: every file read and trimmed, at the output rate
    from .corpus import load_corpus

    corpus = None
    try:
        corpus = load_corpus(recipe.corpus, sr=rates.sr, slot_duration=rates.rows[0].period)
    except StimforgeError as exc:
        found.append(Finding("corpus", "problem", _first_line(exc)))
    if corpus is not None:
        flags: dict[str, int] = {}
        for t in corpus.tokens:
            for f in t.qc.flags:
                flags[f] = flags.get(f, 0) + 1
        fl = ("; QC flags: " + ", ".join(f"{k} {v}" for k, v in sorted(flags.items()))
              + " (stimforge inspect lists them)") if flags else "; no QC flag"
        found.append(Finding("corpus", "ok", f"{len(corpus.tokens)} tokens, "
                             f"{len(corpus.labels)} labels at {rates.sr} Hz{fl}"))

    # ---- material
    groups = _material(recipe, found)

    # ---- labels covered
    if groups is not None and corpus is not None:
        have = set(corpus.labels)
        uses: dict[str, int] = {}
        for g in groups:
            for lab in g:
                uses[lab] = uses.get(lab, 0) + 1
        missing = sorted(lab for lab in uses if lab not in have)
        if missing:
            found.append(Finding("labels", "problem", f"{len(missing)} label(s) of the material "
                                 "have no token in the corpus: "
                                 + ", ".join(f"{lab!r} ({uses[lab]} uses)" for lab in missing)
                                 + "; add tokens with these labels, or correct the material"))
        else:
            found.append(Finding("labels", "ok", f"all {len(uses)} labels of the material have "
                                 "tokens"))

    # ---- design: constraints, lists, rotation, balance (the build's own seeded code)
    design = None
    if corpus is not None and groups is not None and not any(
            f.check == "labels" and f.status == "problem" for f in found):
        from .design import make_design

        pool = {lab: [t.id for t in toks] for lab, toks in corpus.by_label().items()}
        try:
            design = make_design(recipe, pool, rng=recipe.seed)
        except StimforgeError as exc:
            found.append(Finding("design", "problem", _first_line(exc)))
        else:
            n_lists = len({p.list for p in design.presentations})
            found.append(Finding("design", "ok", f"{len(design.trials)} trials, "
                                 f"{len(design.presentations)} presentations in {n_lists} "
                                 "list(s); constraints met, labels balanced across conditions"))

    # ---- stretch factors of the tokens the build would re-time
    if corpus is not None:
        if design is not None:
            used = {u.token_id for p in design.trials for u in p.units}
            tokens = [t for t in corpus.tokens if t.id in used]
        else:
            wanted = None if groups is None else {lab for g in groups for lab in g}
            tokens = [t for t in corpus.tokens if wanted is None or t.label in wanted]
        found.append(_stretch(tokens, n_samples=rates.slot_lengths[0], sr=rates.sr,
                              retime=recipe.retime))

    # ---- size of the set
    from .build import estimate_build

    try:
        est = estimate_build(recipe, check=check)
        soft, hard = est.problems()
    except StimforgeError as exc:  # pragma: no cover - the recipe validated
        found.append(Finding("size", "problem", _first_line(exc)))
    else:
        if hard:
            found.append(Finding("size", "problem", "cannot be built here: " + "; ".join(hard)
                                 + f" (estimate: {est.format()}); use fewer trials or lists"))
        elif soft and not allow_large:
            found.append(Finding("size", "problem", "; ".join(soft) + f" (estimate: "
                                 f"{est.format()}); pass --allow-large if you mean it"))
        else:
            found.append(Finding("size", "ok", est.format()
                                 + ("; beyond the usual limits, allowed" if soft else "")))
    order = {c: i for i, c in enumerate(CHECKS)}
    found.sort(key=lambda f: order[f.check])
    return done(recipe.name)


def _material(recipe: Any, found: list[Finding]) -> list[tuple[str, ...]] | None:
    """Parse the material text (or note the generated material); None on a problem."""
    from .design import parse_material, read_material_text

    mat = recipe.material
    top = recipe.hierarchy.names[-1]
    if mat.text is None:
        gen = mat.generate
        found.append(Finding("material", "ok", f"generated ({gen.mode}); its constraints are "
                             "checked with the design"))
        # the labels it draws from, for the label check
        return [tuple(w) for w in gen.words] if gen.mode == "words" else [
            (u,) for u in gen.units or ()]
    path = Path(mat.text)
    try:
        groups = parse_material(read_material_text(path), hierarchy=recipe.hierarchy,
                                source=str(path))
    except StimforgeError as exc:
        found.append(Finding("material", "problem", _first_line(exc)))
        return None
    found.append(Finding("material", "ok", f"{len(groups)} {top}s in {path.name}"))
    return groups


def _stretch(tokens: list[Any], *, n_samples: int, sr: int, retime: Any) -> Finding:
    """Every token's stretch factor against ``retime.stretch_range`` and the backend limits,
    decided by the build's own planner."""
    from .retime import _plan

    if not tokens:
        return Finding("stretch", "skipped", "no token to re-time")
    bad, warned, factors = [], [], []
    for t in tokens:
        n_tok = int(t.samples.size)
        if n_tok < 1:
            bad.append(f"{t.id!r}: empty after trimming")
            continue
        plan = _plan(n_tok, n_samples, retime)
        factors.append(plan.factor)
        if plan.problem is not None:
            what = "too short" if plan.factor > 1 else "too long"
            bad.append(f"{t.id!r} ({n_tok / sr * 1000:.0f} ms, {what}): factor {plan.factor:.3f}")
        elif plan.warnings:
            warned.append(t.id)
    lo, hi = retime.stretch_range
    slot_ms = n_samples / sr * 1000
    if bad:
        return Finding("stretch", "problem",
                       f"{len(bad)} token(s) need a stretch factor (slot {slot_ms:.0f} ms / token "
                       f"duration) outside retime.stretch_range [{lo:g}, {hi:g}] or the "
                       f"{retime.backend} backend's limits: " + "; ".join(bad)
                       + ". Fix: use tokens closer to the slot, widen retime.stretch_range, or "
                       "set retime.out_of_range to 'warn' or 'cut-pad'")
    note = (f"; {len(warned)} outside the range, allowed by retime.out_of_range "
            f"'{retime.out_of_range}'" if warned else "")
    return Finding("stretch", "ok", f"{len(tokens)} tokens: factors {min(factors):.3f}-"
                   f"{max(factors):.3f} within [{lo:g}, {hi:g}]" + note)
