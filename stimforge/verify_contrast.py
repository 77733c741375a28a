"""Boundary contrasts of the acoustic check, and what drives a flagged position.

The position tests of :mod:`stimforge.verify` compare the *elements* of a level's group (phrase
1 against phrase 2 of a sentence), blocked by the position below.  A cue that natural speech
carries sits on *one unit* at a boundary (final lowering or rise, final lengthening, initial
strengthening, a breath before a line): in those tests it lands in one block of ``below`` and
is diluted.  The contrasts here test that one unit directly.

Which units are compared
------------------------
For a level with groups of ``s`` elements, each element ``P`` units long (``P = 1`` for the
first level above the unit):

* **first**: the first unit of every group (index ``g*s*P``) against the first units of the
  group's other elements (``g*s*P + j*P``, ``j = 1 .. s-1``);
* **last**: the last unit of every group against the last units of the group's other elements.

The units compared share every lower-level position (all of them open, or close, a group at
every level below) and the trial; only the boundary of *this* level differs.  One block is one
(trial, group).

The test
--------
An aligned-rank randomisation test (Hodges & Lehmann 1962, aligned ranks for randomised
blocks): every value minus its block's mean, ranked over all blocks (mid-ranks for ties); the
statistic is the sum over blocks of ``m/(m-1) * (rank of the boundary unit - the block's mean
rank)``, for ``m`` measured units in the block.  Under the null that the boundary unit is any
of its block's units with equal probability its mean is 0 and its variance is exactly
``sum over blocks of (m/(m-1))**2 * mean((rank - block mean rank)**2)``; the p-value is
two-sided from the normal approximation.  It assumes only exchangeability within a block (no
symmetry, no normality): checked by simulation in ``tests/test_verify_boundary.py``, where it is
slightly conservative below ~30 blocks.  Blocks whose boundary unit is unmeasured (NaN, e.g. an
unvoiced unit for F0) or that have no measured comparison unit are left out.

The effect is given in the feature's own unit (dB, ms, semitones, Hz): the median over blocks of
(boundary unit - mean of the block's other units).

Breakdown
---------
:func:`breakdown` says what sits at a flagged position: per label, per token (build folders,
from ``units.tsv``) and per file, the values at the flagged units against the compared ones, and
whether the difference comes with the material (labels that occur only there), with which labels
sit there (composition), or with the audio of the same labels differing there (rendering).
"""

from __future__ import annotations

import warnings
from collections import defaultdict
from typing import Sequence

import numpy as np
from scipy import stats as _st
from scipy.special import ndtr

__all__ = ["BOUNDARIES", "boundary_units", "element_units", "aligned_rank_test", "breakdown",
           "SETTING_HINTS"]

BOUNDARIES = ("first", "last")

#: What a recipe can change against a position-linked cue in each feature (build folders only).
SETTING_HINTS = {
    "rise_ms": "retime.align: steepest-rise (puts every token's steepest envelope rise at "
               "retime.align_offset into its slot)",
    "active_ms": "retime.backend: world (re-times every token to fill its slot; cut-pad keeps "
                 "each token's own length)",
    "f0_st": "pitch.policy: flat (or 'contour' for tone languages: one height, contours kept)",
    "rms_db": "loudness.target_dbfs / loudness.active_threshold_db (every token equalised over its "
              "active part); with cut-pad tokens of unequal length the slot level follows "
              "the length: retime.backend: world",
    "join_step_db": "loudness.fade (longer raised-cosine fades at the joins)",
    "centroid_hz": None,  # no setting changes a syllable's spectrum
}


def boundary_units(sizes: Sequence[int], level_index: int, where: str,
                   n_units: int) -> tuple[np.ndarray, np.ndarray]:
    """Unit indices of a boundary contrast.

    Parameters
    ----------
    sizes : sequence of int
        Group sizes of the levels above the unit, lowest first.
    level_index : int
        The level (0 = the first above the unit).
    where : {"first", "last"}
    n_units : int
        Units per trial (analysed); whole groups only are used.

    Returns
    -------
    targets : ndarray, shape (n_groups,)
        The boundary unit of every group.
    others : ndarray, shape (n_groups, s - 1)
        The units that differ from it only in this level's boundary.
    """
    if where not in BOUNDARIES:
        raise ValueError(f"where must be one of {BOUNDARIES}, got {where!r}")
    P = int(np.prod(sizes[:level_index])) if level_index else 1
    s = int(sizes[level_index])
    per = P * s
    g0 = np.arange(n_units // per)[:, None] * per
    j = np.arange(s)[None, :] * P
    idx = g0 + j + (P - 1 if where == "last" else 0)  # (G, s): the elements' first/last units
    if where == "first":
        return idx[:, 0], idx[:, 1:]
    return idx[:, -1], idx[:, :-1]


def element_units(sizes: Sequence[int], level_index: int, position: int,
                  n_units: int) -> np.ndarray:
    """Boolean mask (n_units,) of the units in element ``position`` of every group of a level."""
    P = int(np.prod(sizes[:level_index])) if level_index else 1
    s = int(sizes[level_index])
    k = np.arange(n_units)
    whole = k < (n_units // (P * s)) * P * s
    return whole & ((k % (P * s)) // P == position)


def aligned_rank_test(x: np.ndarray) -> dict[str, np.ndarray]:
    """Aligned-rank test of column 0 of every block against the block's other columns.

    Parameters
    ----------
    x : ndarray, shape (..., n_blocks, m)
        Column 0 holds the boundary unit, columns 1.. the compared units; NaN = not measured.
        Leading axes are independent tests.

    Returns
    -------
    dict of ndarray, each of shape ``x.shape[:-2]``
        ``z``, ``p`` (two-sided), ``n_blocks`` (blocks used), ``effect`` (median over blocks of
        column 0 minus the mean of the others, in x's unit), ``mean_effect`` (the same, mean
        over blocks: it moves when only some blocks carry a cue), ``target_median``,
        ``others_median``.
    """
    x = np.asarray(x, dtype=np.float64)
    if x.ndim < 2 or x.shape[-1] < 2:
        raise ValueError(f"aligned_rank_test needs blocks of at least 2 units, got shape {x.shape}")
    valid = np.isfinite(x)
    usable = valid[..., 0] & (valid[..., 1:].sum(axis=-1) >= 1)
    valid &= usable[..., None]
    m = valid.sum(axis=-1)  # (..., B)
    xv = np.where(valid, x, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        # summed in sorted order: the same mean (to the bit) whichever unit is the target, so
        # that float noise cannot break ties differently under the permutations
        mean = np.sort(xv, axis=-1).sum(axis=-1) / m
        aligned = np.where(valid, x - mean[..., None], np.nan)
        others = (xv[..., 1:].sum(axis=-1)) / (m - 1)
        diff = np.where(usable, x[..., 0] - others, np.nan)
    lead, (B, M) = x.shape[:-2], x.shape[-2:]
    flat = aligned.reshape(*lead, B * M)
    if np.any(valid):
        ranks = _st.rankdata(flat, axis=-1, nan_policy="omit").reshape(x.shape)
    else:
        ranks = np.full(x.shape, np.nan)
    rv = np.where(valid, ranks, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        rbar = rv.sum(axis=-1) / m
        w = m / (m - 1.0)
        D = np.where(usable, w * (rv[..., 0] - rbar), 0.0)
        dev2 = np.where(valid, (ranks - rbar[..., None]) ** 2, 0.0).sum(axis=-1)
        Vb = np.where(usable, w * w * dev2 / m, 0.0)
    S = D.sum(axis=-1)
    V = Vb.sum(axis=-1)
    ok = V > 1e-12
    z = np.where(ok, S / np.sqrt(np.where(ok, V, 1.0)), 0.0)
    p = np.where(ok, 2.0 * ndtr(-np.abs(z)), 1.0)  # two-sided normal tail
    n_used = usable.sum(axis=-1)

    with warnings.catch_warnings():  # all-NaN tests give NaN means, not warnings
        warnings.simplefilter("ignore", RuntimeWarning)
        effect = _nanmedian(np.where(usable, diff, np.nan))
        mean_effect = np.nanmean(np.where(usable, diff, np.nan), axis=-1)
        t_med = _nanmedian(np.where(usable, x[..., 0], np.nan))
        o_med = _nanmedian(np.where(valid[..., 1:], x[..., 1:], np.nan).reshape(*lead, -1))
    return {"z": z, "p": p, "n_blocks": n_used, "effect": effect, "mean_effect": mean_effect,
            "target_median": t_med, "others_median": o_med}


def _nanmedian(a: np.ndarray) -> np.ndarray:
    """Median over the last axis ignoring NaN (NaN where nothing is left); the same values as
    ``np.nanmedian(a, axis=-1)``, without its masked-array path for small arrays."""
    s = np.sort(a, axis=-1)  # NaN sort last
    n = np.isfinite(s).sum(axis=-1)
    lo = np.clip((n - 1) // 2, 0, None)[..., None]
    hi = np.clip(n // 2, 0, None)[..., None]
    m = 0.5 * (np.take_along_axis(s, lo, -1) + np.take_along_axis(s, hi, -1))[..., 0]
    return np.where(n > 0, m, np.nan)


# ---------------------------------------------------------------------------------------------
# What drives a flagged position
# ---------------------------------------------------------------------------------------------
def _median(v: list[float]) -> float:
    return float(np.median(v)) if v else float("nan")


def _mean(v: list[float]) -> float:
    return float(np.mean(v)) if v else float("nan")


def _groups(keys: np.ndarray, vals: np.ndarray, flag: np.ndarray, comp: np.ndarray, *,
            reference: float, top: int) -> list[dict]:
    """Per key: count, median and mean at the flagged units and at the compared ones."""
    at_f: dict[str, list[float]] = defaultdict(list)
    at_c: dict[str, list[float]] = defaultdict(list)
    for k, v, f, c in zip(keys.ravel(), vals.ravel(), flag.ravel(), comp.ravel()):
        if not np.isfinite(v):
            continue
        if f:
            at_f[str(k)].append(float(v))
        elif c:
            at_c[str(k)].append(float(v))
    n_f = sum(len(v) for v in at_f.values()) or 1
    out = []
    for k, vf in at_f.items():
        vc = at_c.get(k, [])
        out.append({"name": k, "n_flagged": len(vf), "median_flagged": _median(vf),
                    "mean_flagged": _mean(vf), "n_elsewhere": len(vc),
                    "median_elsewhere": _median(vc), "mean_elsewhere": _mean(vc),
                    "share": len(vf) / n_f,
                    # how much of the flagged units' mean distance from the compared units this
                    # key carries: its share times its own distance (the shares sum to 1)
                    "contribution": len(vf) / n_f * (_mean(vf) - reference)})
    out.sort(key=lambda r: -abs(r["contribution"]))
    return out[:top]


def breakdown(values: np.ndarray, *, flagged: np.ndarray, compared: np.ndarray, unit: str,
              feature: str, labels: np.ndarray | None = None, tokens: np.ndarray | None = None,
              files: Sequence[str] | None = None, build: bool = False, top: int = 5,
              nested: Sequence[tuple[str, np.ndarray]] = ()) -> dict:
    """What sits at a flagged position and how it measures against the compared units.

    Parameters
    ----------
    values : ndarray, shape (n_trials, n_units)
        One feature of every analysed unit (NaN = not measured).
    flagged, compared : ndarray of bool, shape (n_units,) or (n_trials, n_units)
        The units at the flagged position and those it was compared with.
    unit : str
        The feature's unit (dB, ms, st, Hz).
    feature : str
        Feature name (for the recipe setting that addresses it).
    labels, tokens : ndarray of str, shape (n_trials, n_units), optional
        From a build folder's ``units.tsv``; without them only the per-file view is given.
    files : sequence of str, optional
        One name per trial.
    build : bool
        True for a build folder: name the recipe setting that addresses this kind of cue.
    top : int
        Rows kept per view.
    nested : sequence of (level name, mask (n_units,))
        Higher levels whose same boundary some flagged units also sit at (a phrase's last unit
        may end a sentence): the flagged units are split by it, to say at which level the
        difference sits.

    Returns
    -------
    dict
        ``flagged`` / ``compared`` ({n, median, mean}), ``difference`` (of the medians, in
        ``unit``), ``mean_difference`` (of the means: the views below use means, so that a cue
        on a minority of the flagged units shows), ``by_label``, ``by_token``, ``by_file``
        (lists of {name, n_flagged, median_flagged, mean_flagged, n_elsewhere,
        median_elsewhere, mean_elsewhere, share, contribution (share x (mean_flagged - the
        compared units' mean))}), ``only_here_share`` (the share of flagged units whose label
        never occurs at the compared positions), ``same_label_difference``,
        ``driver`` ("material" | "rendering" | "composition" | "compared" (the compared units,
        not the flagged ones, are atypical) | "unknown"), ``explanation``,
        ``setting`` (str or None) and ``nested`` ([{level, n_at, mean_at, n_not, mean_not}];
        ``sits_at``: the higher level the difference sits at, or None).
    """
    V = np.asarray(values, dtype=np.float64)
    F = np.broadcast_to(np.asarray(flagged, dtype=bool), V.shape)
    C = np.broadcast_to(np.asarray(compared, dtype=bool), V.shape) & ~F
    ok = np.isfinite(V)
    vf, vc = V[F & ok], V[C & ok]
    mf, mc = (float(np.median(vf)) if vf.size else float("nan"),
              float(np.median(vc)) if vc.size else float("nan"))
    af, ac = (float(np.mean(vf)) if vf.size else float("nan"),
              float(np.mean(vc)) if vc.size else float("nan"))
    # means drive the views below: a cue on a minority of the flagged units (a phrase's last
    # unit that also ends a sentence) moves the mean while the median stays put
    diff = af - ac
    out: dict = {"feature": feature, "unit": unit,
                 "flagged": {"n": int(vf.size), "median": mf, "mean": af},
                 "compared": {"n": int(vc.size), "median": mc, "mean": ac},
                 "difference": mf - mc, "mean_difference": diff,
                 "by_label": [], "by_token": [], "by_file": [], "only_here_share": None,
                 "same_label_difference": None, "same_token_difference": None,
                 "driver": "unknown", "explanation": "", "setting": None}
    out["nested"], out["sits_at"] = [], None
    best = 0.0
    for name, mask in nested:
        M = np.broadcast_to(np.asarray(mask, dtype=bool), V.shape)
        a, b = V[F & M & ok], V[F & ~M & ok]
        if not a.size or not b.size:
            continue
        ma, mb = float(np.mean(a)), float(np.mean(b))
        out["nested"].append({"level": name, "n_at": int(a.size), "mean_at": ma,
                              "n_not": int(b.size), "mean_not": mb})
        # the difference sits there when the flagged units at that boundary carry it and the
        # others hardly do
        if abs(ma - ac) >= 2.0 * abs(mb - ac) and abs(ma - ac) > best:
            best, out["sits_at"] = abs(ma - ac), name
    if files is not None:
        fk = np.broadcast_to(np.asarray(list(files), dtype=object)[:, None], V.shape)
        out["by_file"] = _groups(fk, V, F, C, reference=ac, top=top)
    if labels is None:
        out["explanation"] = ("labels and tokens are known only for a build folder (units.tsv); "
                              "the files whose flagged units differ most are listed")
        return _with_nested(out, unit)
    L = np.asarray(labels, dtype=object)
    out["by_label"] = _groups(L, V, F, C, reference=ac, top=top)
    if tokens is not None:
        out["by_token"] = _groups(np.asarray(tokens, dtype=object), V, F, C, reference=ac,
                                  top=top)
    # material: labels at the flagged units that never occur at the compared ones
    comp_labels = set(map(str, L[C & ok]))
    flag_labels = [str(x) for x in L[F & ok]]
    only = [x for x in flag_labels if x not in comp_labels]
    share = len(only) / len(flag_labels) if flag_labels else 0.0
    out["only_here_share"] = share

    def matched(keys: np.ndarray) -> float | None:
        """Count-weighted mean over keys found at both of (flagged - elsewhere) means."""
        d: dict[str, tuple[list[float], list[float]]] = defaultdict(lambda: ([], []))
        for k, v, f, c in zip(keys.ravel(), V.ravel(), F.ravel(), C.ravel()):
            if np.isfinite(v) and (f or c):
                d[str(k)][0 if f else 1].append(float(v))
        w, dv = [], []
        for a, b in d.values():
            if a and b:
                w.append(len(a))
                dv.append(np.mean(a) - np.mean(b))
        if not w:
            return None
        return float(np.average(dv, weights=w))

    same_label = matched(L)
    same_token = matched(np.asarray(tokens, dtype=object)) if tokens is not None else None
    out["same_label_difference"] = same_label
    out["same_token_difference"] = same_token
    top_only = sorted({x for x in only}, key=lambda x: -only.count(x))[:3]
    both = V[(F | C) & ok]
    typical = float(np.median(both)) if both.size else float("nan")
    if np.isfinite(typical) and abs(af - typical) < 0.5 * abs(ac - typical):
        out["driver"] = "compared"
        out["explanation"] = (
            f"the flagged units are typical ({af:.3g} {unit} on average, all units "
            f"{typical:.3g}); the compared units differ ({ac:.3g}): look at the test of their "
            "own position or boundary")
        return _with_nested(out, unit)
    if share >= 0.5:
        out["driver"] = "material"
        out["explanation"] = (
            f"inherent to the material: {share:.0%} of the flagged units carry labels that "
            f"never occur at the compared positions ({', '.join(top_only)}): fixed words or "
            "syllables sit at this boundary. No recipe setting removes that; balance the "
            "material across positions, or report the cue and its size")
    elif same_label is not None and np.isfinite(diff) and abs(same_label) >= 0.5 * abs(diff):
        out["driver"] = "rendering"
        how = ("the same tokens" if same_token is not None and abs(same_token) >= 0.5 * abs(diff)
               else "other tokens of the same labels")
        out["explanation"] = (
            f"the same labels measure {same_label:+.3g} {unit} differently at this position "
            f"({how}): the audio at this boundary differs, not only which syllables sit there")
        if build:
            out["setting"] = SETTING_HINTS.get(feature)
    else:
        out["driver"] = "composition"
        out["explanation"] = (
            "mostly which labels sit there: the labels at the flagged units measure differently "
            "wherever they occur (the material's composition at this boundary)")
        if build:
            out["setting"] = SETTING_HINTS.get(feature)
    if build and out["setting"] is None and out["driver"] != "material":
        out["explanation"] += ("; no recipe setting changes this feature: balance the labels "
                               "across positions")
    return _with_nested(out, unit)


def _with_nested(out: dict, unit: str) -> dict:
    if out.get("sits_at"):
        n = next(x for x in out["nested"] if x["level"] == out["sits_at"])
        lead = (f"the difference sits at the {n['level']} boundary: the flagged units there "
                f"measure {n['mean_at']:.3g} {unit} on average, the others {n['mean_not']:.3g} "
                f"{unit} (compared units {out['compared']['mean']:.3g} {unit})")
        out["explanation"] = lead + ("; " + out["explanation"] if out["explanation"] else "")
    return out
