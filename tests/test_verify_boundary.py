"""Boundary contrasts of the acoustic check (stimforge/verify_contrast.py) and the family they
join: which units are compared, the aligned-rank test against hand and enumeration values, its
calibration, the family-wise false-positive rate of the larger family by simulation, the
vectorised per-unit features against the shared measurements, and the breakdown.

Everything here is arrays made in this file (no audio, no build code): fast.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

from stimforge import acoustics as A
from stimforge import verify as V
from stimforge.grid import grid_from_numbers
from stimforge.verify_contrast import (aligned_rank_test, boundary_units, breakdown,
                                       element_units)


def _design(levels, n_top=2, T=0.25, sr=16000):
    grid = grid_from_numbers(unit_duration=T, levels=list(levels), sr=sr, n_top_groups=n_top,
                             unit_name="syllable")
    return V.Design(grid=grid, mode="files", source="t")


# --------------------------------------------------------------------------------------------
# Which units are compared
# --------------------------------------------------------------------------------------------
def test_boundary_units_of_a_three_level_hierarchy():
    # syllable -> word of 2 -> phrase of 2 -> sentence of 2: 8 syllables a sentence [calc]
    sizes, n = [2, 2, 2], 16
    t, o = boundary_units(sizes, 2, "first", n)
    assert t.tolist() == [0, 8] and o.tolist() == [[4], [12]]  # first of phrase 2
    t, o = boundary_units(sizes, 2, "last", n)
    assert t.tolist() == [7, 15] and o.tolist() == [[3], [11]]  # last of phrase 1
    t, o = boundary_units(sizes, 1, "first", n)
    assert t.tolist() == [0, 4, 8, 12] and o.tolist() == [[2], [6], [10], [14]]
    t, o = boundary_units(sizes, 0, "last", n)
    assert t.tolist() == [1, 3, 5, 7, 9, 11, 13, 15] and o.ravel().tolist() == [0, 2, 4, 6, 8,
                                                                                  10, 12, 14]


def test_boundary_units_with_groups_of_three():
    # unit -> word of 2 -> line of 3 words: 6 units a line; the line's first unit against the
    # first units of words 2 and 3, its last against the last units of words 1 and 2 [calc]
    t, o = boundary_units([2, 3], 1, "first", 12)
    assert t.tolist() == [0, 6] and o.tolist() == [[2, 4], [8, 10]]
    t, o = boundary_units([2, 3], 1, "last", 12)
    assert t.tolist() == [5, 11] and o.tolist() == [[1, 3], [7, 9]]
    assert element_units([2, 3], 1, 2, 12).nonzero()[0].tolist() == [4, 5, 10, 11]


# --------------------------------------------------------------------------------------------
# The aligned-rank test
# --------------------------------------------------------------------------------------------
def test_aligned_rank_hand_example():
    # blocks (3, 1) and (5, 2): aligned [1, -1] and [1.5, -1.5]; ranks 3, 2 and 4, 1;
    # D = 2 * (3 - 2.5) + 2 * (4 - 2.5) = 4; V = 4 * 0.25 + 4 * 2.25 = 10; z = 4 / sqrt(10)
    # = 1.2649, p = 2 * (1 - Phi(1.2649)) = 0.2059; effect median(2, 3) = 2.5 [calc]
    r = aligned_rank_test(np.array([[3.0, 1.0], [5.0, 2.0]]))
    assert float(r["z"]) == pytest.approx(4 / math.sqrt(10))
    assert float(r["p"]) == pytest.approx(0.2059, abs=1e-4)
    assert float(r["effect"]) == 2.5 and int(r["n_blocks"]) == 2


@pytest.mark.parametrize("B, s", [(6, 2), (5, 3), (4, 4)])
def test_aligned_rank_permutation_moments_are_exact(rng, B, s):
    # Under "the boundary unit is any of its block's units", z over all s**B assignments has
    # mean 0 and variance 1 exactly: the variance used is the permutation variance [calc].
    x = np.round(rng.lognormal(0, 1, (B, s)), 1)  # skewed, with ties
    zs = []
    for pick in itertools.product(range(s), repeat=B):
        y = x.copy()
        for b, j in enumerate(pick):
            y[b, [0, j]] = y[b, [j, 0]]
        zs.append(float(aligned_rank_test(y)["z"]))
    zs = np.array(zs)
    assert abs(zs.mean()) < 1e-9 and zs.var() == pytest.approx(1.0, rel=1e-9)


def test_aligned_rank_normal_p_against_exact_permutation_p(rng):
    # 12 blocks of 2: the normal p against the exact permutation p (all 4096 assignments)
    x = rng.standard_normal((12, 2))
    x[:, 0] += 1.5
    z0 = float(aligned_rank_test(x)["z"])
    zs = []
    for pick in itertools.product((0, 1), repeat=12):
        y = x.copy()
        flip = np.array(pick, bool)
        y[flip] = y[flip][:, ::-1]
        zs.append(float(aligned_rank_test(y)["z"]))
    exact = np.mean(np.abs(zs) >= abs(z0) - 1e-12)
    normal = float(aligned_rank_test(x)["p"])
    assert exact < 0.05 and normal == pytest.approx(exact, rel=0.35)  # common practice


def test_aligned_rank_ties_and_missing_values():
    x = np.ones((10, 3))
    r = aligned_rank_test(x)
    assert float(r["p"]) == 1.0 and float(r["z"]) == 0.0  # all tied: no evidence
    y = np.arange(30.0).reshape(10, 3)
    y[0, 0] = np.nan  # unmeasured boundary unit: block left out
    y[1, 1] = np.nan  # one comparison missing: the block stays
    y[2, 1:] = np.nan  # no comparison left: block left out
    r = aligned_rank_test(y)
    assert int(r["n_blocks"]) == 8
    # boundary unit 2 below the mean of its others in every block (e.g. 3 vs 4.5) [calc]
    assert float(r["effect"]) == pytest.approx(-1.5) and float(r["z"]) < 0


def test_aligned_rank_is_not_liberal(rng):
    # 20000 null tests of skewed data: rejections at alpha .01 and .001 stay at or below the
    # nominal rate (binomial SE 0.0007 and 0.0002) [calc]
    for s in (2, 3):
        x = rng.lognormal(0.0, 1.0, (20000, 40, s))
        p = aligned_rank_test(x)["p"]
        assert 0.006 <= np.mean(p < 0.01) <= 0.0115, (s, np.mean(p < 0.01))
        assert np.mean(p < 0.001) <= 0.0016, (s, np.mean(p < 0.001))


def test_boundary_contrast_catches_a_cue_the_position_test_dilutes(rng):
    # 4 levels of 2 above the unit, 16 units a top group: +0.8 SD on the last unit of every top
    # group.  The top level's position test compares its two halves over 8 blocks per group,
    # so the cue sits in 1 of 8 and is diluted; the boundary contrast tests that unit [calc].
    d = _design([("w", 2), ("p", 2), ("s", 2), ("t", 2)], n_top=4)
    F = rng.standard_normal((12, 64, len(V.FEATURES)))
    F[:, 15::16, 0] += 0.8
    pos = next(r for r in V.feature_rows(F, design=d, condition="c")
               if (r["level"], r["feature"]) == ("t", "rms_db"))
    bnd = next(r for r in V.boundary_rows(F, None, design=d, condition="c")
               if (r["level"], r["feature"], r["where"]) == ("t", "rms_db", "last"))
    # spec bounds, not published values: the contrast sees the +0.8 SD unit in every one of the
    # 12 x 4 blocks, the position test only diluted (1 of 8 positions), so it must be far
    # stronger; its effect (a median over 48 blocks of unit-SD noise, SE ~ 0.18, calc) lies
    # within 0.5 of the planted 0.8
    assert bnd["p"] < 1e-3 and bnd["p"] < pos["p"] / 20
    assert bnd["value"] == pytest.approx(0.8, abs=0.5)


# --------------------------------------------------------------------------------------------
# The whole family on simulated clean sets
# --------------------------------------------------------------------------------------------
def _clean_family(rng, d, *, n_trials, pool):
    """One simulated clean set: spectra with a falling floor, units drawn from a token pool."""
    K = d.grid.n_bins_needed()
    scale = 1.0 / np.sqrt(1.0 + np.arange(K) / 8.0)
    rows = []
    for kind in V.ENVELOPES:
        Z = (rng.standard_normal((n_trials, K)) + 1j * rng.standard_normal((n_trials, K))) * scale
        rows += V.spectral_rows(Z, design=d, condition="c", kind=kind)
    tok = rng.integers(0, pool.shape[0], (n_trials, d.n_units))
    F = pool[tok] + 0.002 * rng.standard_normal((n_trials, d.n_units, pool.shape[1]))
    F[..., 2] = np.where(np.isnan(pool[tok, 2]), np.nan, F[..., 2])
    J = np.where(rng.random((n_trials, d.n_units)) < 0.8, -35.0,
                 -15.0 + 3 * rng.standard_normal((n_trials, d.n_units)))
    rows += V.feature_rows(F, design=d, condition="c")
    rows += V.boundary_rows(F, J, design=d, condition="c")
    rows += V.join_rows(J, design=d, condition="c")
    return rows


@pytest.mark.parametrize("levels, n_top", [([("word", 2), ("phrase", 2), ("sentence", 2)], 4),
                                           ([("w", 2), ("p", 2), ("s", 2), ("t", 2)], 4)])
def test_clean_sets_fail_at_about_alpha_with_the_larger_family(rng, levels, n_top):
    """Holm over spectral + position + boundary + join tests on simulated clean sets: the
    family-wise false-positive rate is at most about alpha (Holm guarantees <= alpha; the
    correlated tests and the slightly conservative rank tests make it smaller).  alpha = 0.05
    so that 300 sets give a usable count; tokens from a pool of 40 (level, duration, F0 with a
    fifth unvoiced, centroid, rise latency), so values repeat and tie as in real sets."""
    d = _design(levels, n_top=n_top)
    alpha, n_sim, hits, sizes = 0.05, 300, 0, []
    for _ in range(n_sim):
        pool = np.column_stack([rng.normal(-26, 1.5, 40), rng.lognormal(5.2, 0.15, 40),
                                np.where(rng.random(40) < 0.2, np.nan, rng.normal(4, 2, 40)),
                                rng.normal(1500, 300, 40), rng.lognormal(3.5, 0.4, 40)])
        rows = _clean_family(rng, d, n_trials=12, pool=pool)
        V.apply_holm(rows, alpha)
        hits += any(r["significant"] for r in rows)
        sizes.append(len(rows))
    rate = hits / n_sim
    # every level: 6 features x first/last boundary contrasts in the family
    assert sum(r["measure"] == "boundary" for r in rows) == 12 * len(levels)
    # binomial SE at 0.05 over 300 sets is 0.0126: allow 0.01 .. 0.08 [calc]
    assert 0.01 <= rate <= 0.08, rate


# --------------------------------------------------------------------------------------------
# Per-unit features, vectorised, against the shared measurements
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("n, L", [(5, 1), (7, 4), (101, 20), (300, 299), (4000, 441)])
def test_moving_average_equals_convolve(rng, n, L):
    a = rng.random((3, n))
    ref = np.stack([np.convolve(r, np.ones(L) / L, mode="same") for r in a])
    assert np.allclose(V.moving_average(a, L), ref, atol=1e-12)


def test_unit_features_match_the_shared_measurements(rng):
    # reference: stimforge.acoustics (rms_dbfs, active_bounds, steepest_rise_time), one slot at
    # a time, the functions the build and the corpus QC use
    sr, n = 16000, 4000
    U = np.zeros((6, n))
    for k in range(5):
        a, b = int(rng.integers(0, 800)), int(rng.integers(2400, 4000))
        t = np.arange(b - a) / sr
        U[k, a:b] = np.sin(2 * np.pi * rng.uniform(100, 200) * t) * np.hanning(b - a) ** 0.3
    feats, active = V.unit_features(U, sr=sr)
    for k in range(5):
        assert feats[k, 0] == pytest.approx(A.rms_dbfs(U[k]), abs=1e-9)
        ab = A.active_bounds(U[k], sr=sr)
        assert active[k, 0] * sr == ab[0] and active[k, 1] * sr == ab[1]
        assert feats[k, 4] == pytest.approx(A.steepest_rise_time(U[k], sr=sr) * 1000, abs=1000 / sr)
    assert np.isinf(feats[5, 0]) and np.isnan(feats[5, 4]) and feats[5, 1] == 0.0  # silence


# --------------------------------------------------------------------------------------------
# Breakdown
# --------------------------------------------------------------------------------------------
def _labelled(rng, n_trials=10, n_units=8):
    labels = rng.choice(np.array(["ba", "di", "ku", "mo"], dtype=object), (n_trials, n_units))
    tokens = np.array([[f"{lab}_1.wav" for lab in row] for row in labels], dtype=object)
    base = {"ba": -26.0, "di": -27.0, "ku": -25.5, "mo": -26.5}
    V = np.vectorize(base.get)(labels).astype(float) + 0.01 * rng.standard_normal(labels.shape)
    return labels, tokens, V


def test_breakdown_tells_rendering_from_material(rng):
    labels, tokens, vals = _labelled(rng)
    flag = np.zeros(8, bool)
    flag[[3, 7]] = True
    comp = ~flag
    # (a) the same labels and tokens are 2 dB louder at the flagged position: rendering
    loud = vals.copy()
    loud[:, flag] += 2.0
    b = breakdown(loud, flagged=flag, compared=comp, unit="dB", feature="rms_db",
                  labels=labels, tokens=tokens, build=True)
    # the planted +2 dB, within 5 SD of the 0.01 dB noise of these values (calc)
    assert b["driver"] == "rendering" and b["same_label_difference"] == pytest.approx(2.0, abs=0.05)
    assert b["setting"] and "level" in b["setting"]
    # (b) a label that only ever sits there, and is louder: inherent to the material
    lab2 = labels.copy()
    lab2[:, flag] = "ti"
    v2 = vals.copy()
    v2[:, flag] = -23.0
    b = breakdown(v2, flagged=flag, compared=comp, unit="dB", feature="rms_db", labels=lab2,
                  tokens=lab2, build=True)
    assert b["driver"] == "material" and b["only_here_share"] == 1.0
    assert b["by_label"][0]["name"] == "ti" and "inherent to the material" in b["explanation"]
    # without labels (plain files): the files whose flagged units differ most
    b = breakdown(loud, flagged=flag, compared=comp, unit="dB", feature="rms_db",
                  files=[f"t{i}.wav" for i in range(10)])
    assert b["driver"] == "unknown" and len(b["by_file"]) == 5 and b["by_label"] == []


def test_plant_only_in_the_conditions_asked():
    d = _design([("line", 4)], n_top=2)
    feats = np.zeros((8, len(V.FEATURES)))
    env = {"broadband": np.ones(400), "auditory": np.ones(400)}

    def m(c, i):
        return V.Measured(name=f"{c}{i}", condition=c, trial=str(i), env=env,
                          env_bounds=np.arange(0, 401, 50), feats=feats,
                          active=np.tile([0.0, 0.2], (8, 1)), energy_ms=np.ones((8, 251)),
                          join_db=np.zeros(8), join_time=np.zeros(8),
                          unit_len=np.full(8, 4000))
    data = V.SetData(design=d, env_sr=200.0, conditions=["a", "b"],
                     by_cond={"a": [m("a", 1), m("a", 2)], "b": [m("b", 1), m("b", 2)]})
    envs, F = V.plant(data, "pitch_step", 2.0, level_index=0, conditions=["a"])
    assert list(F) == ["a"] and envs == {}
    assert F["a"][:, 3::4, 2].tolist() == [[2.0, 2.0], [2.0, 2.0]]  # the lines' last units
    assert np.count_nonzero(F["a"][:, :, 2]) == 4
