"""Statistics of the acoustic check against published values and by simulation.

Every check value carries its source.  Simulations use the statistics layer on synthetic
complex spectra and feature tables (no audio), so they stay cheap.  Random tests take the
shared ``rng`` fixture (tests/conftest.py).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from stimforge import envelopes as E
from stimforge import stats as vs
from stimforge import verify as V
from stimforge.grid import grid_from_numbers


# --------------------------------------------------------------------------------------------
# ERB scale
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize(
    "f, expected",
    # Glasberg & Moore 1990, Hear Res 47:103-138, ERB = 24.7 (4.37 F + 1); values [calc] in
    # DOMAIN.md "Statistics and check values".
    [(100, 35.49), (500, 78.67), (1000, 132.64), (2000, 240.58), (4000, 456.46)],
)
def test_erb_values(f, expected):
    assert E.erb(f) == pytest.approx(expected, abs=0.01)


def test_erb_space_is_equal_in_erb_number():
    c = E.erb_space(180.0, 7250.0, 32)
    assert c[0] == pytest.approx(180.0) and c[-1] == pytest.approx(7250.0)
    steps = np.diff(E.erb_number(c))
    assert np.allclose(steps, steps[0])  # equal ERB-number spacing (definition)
    # ERB-number of 1 kHz = 21.4 log10(5.37) = 15.62 Cams (Glasberg & Moore 1990) [calc]
    assert E.erb_number(1000.0) == pytest.approx(15.62, abs=0.01)


def test_gammatone_bank_centres_and_bandwidths():
    centres, bank = E.gammatone_bank()
    from scipy import signal as sps

    assert len(bank) == 32
    for i in (0, 8, 16, 24):
        w, h = sps.sosfreqz(bank[i], worN=2 ** 16, fs=E.AUDITORY_SR)
        m = np.abs(h)
        assert w[np.argmax(m)] == pytest.approx(centres[i], rel=0.01)
        band = w[m >= m.max() / np.sqrt(2)]
        # 3-dB bandwidth of a 4th-order gammatone = 0.887 ERB (Patterson et al. 1992 / Holdsworth
        # et al. 1988; from memory)
        assert (band[-1] - band[0]) / E.erb(centres[i]) == pytest.approx(0.887, rel=0.03)


# --------------------------------------------------------------------------------------------
# Rayleigh test
# --------------------------------------------------------------------------------------------
def test_rayleigh_zar_example():
    # Zar, Biostatistical Analysis, Example 27.2 (DOMAIN.md [src]).
    ang = np.deg2rad([66, 75, 86, 88, 88, 93, 97, 101, 118, 130])
    r = vs.rayleigh(ang)
    assert r.r == pytest.approx(0.9521, abs=1e-4)
    assert np.rad2deg(r.mean_angle) == pytest.approx(94.05, abs=0.01)
    assert r.z == pytest.approx(9.066, abs=1e-3)
    assert r.p == pytest.approx(5.3e-6, rel=0.02)


def test_rayleigh_same_from_complex_values():
    ang = np.deg2rad([66, 75, 86, 88, 88, 93, 97, 101, 118, 130])
    z = np.array([3.0, 0.5, 1.0, 2.0, 7.0, 1.0, 1.0, 0.2, 4.0, 1.0]) * np.exp(1j * ang)
    assert vs.rayleigh(z).r == pytest.approx(vs.rayleigh(ang).r)


def test_rayleigh_p_half_coherence():
    # n = 10, r = 0.5 -> p 0.0794 (DOMAIN.md, Zar's formula) [calc]
    assert vs.rayleigh_p(10, 5.0) == pytest.approx(0.0794, abs=1e-4)


@pytest.mark.parametrize(
    "n, z05, z01",
    # Critical z at .05 / .01 (DOMAIN.md [calc] from Zar's formula; Zar's Table B.34 lists the
    # same to 3 decimals).
    [(10, 2.921, 4.305), (20, 2.958, 4.455), (100, 2.988, 4.575)],
)
def test_rayleigh_critical_values(n, z05, z01):
    assert vs.rayleigh_p(n, np.sqrt(z05 * n)) == pytest.approx(0.05, abs=5e-4)
    assert vs.rayleigh_p(n, np.sqrt(z01 * n)) == pytest.approx(0.01, abs=2e-4)


def test_rayleigh_p_stays_a_probability():
    # Zar's closed form never leaves [0, 1] (the old series can go negative; DOMAIN.md).
    for n in (2, 3, 5, 10):
        p = vs.rayleigh_p(n, np.linspace(0, n, 200))
        assert np.all((p >= 0) & (p <= 1))
        assert np.all(np.diff(p) <= 1e-12)  # monotone in R


def test_rayleigh_limit_large_n():
    # n -> inf: p -> exp(-z); critical z .05 = 2.996 (DOMAIN.md [calc]: -ln 0.05)
    assert vs.rayleigh_p(100000, np.sqrt(2.996 * 100000)) == pytest.approx(0.05, abs=2e-4)


# --------------------------------------------------------------------------------------------
# Hotelling T2circ
# --------------------------------------------------------------------------------------------
def test_t2circ_worked_values():
    # DOMAIN.md [calc] for Victor & Mast 1991's statistic.
    z = np.array([1, 1 + 0.5j, 0.5 + 1j, 1.5 + 0.5j, 1 + 1j, 0.2 + 0.3j])
    r = vs.t2circ(z)
    assert r.T2 == pytest.approx(2.9132, abs=1e-4)
    assert r.F == pytest.approx(17.479, abs=1e-3)
    assert r.df == (2, 10)
    assert r.p == pytest.approx(5.44e-4, rel=0.005)


def test_t2circ_vectorised_matches_scalar(rng):
    Z = rng.standard_normal((12, 5)) + 1j * rng.standard_normal((12, 5)) + 0.3
    vec = vs.t2circ(Z, axis=0).p
    assert np.allclose(vec, [vs.t2circ(Z[:, k]).p for k in range(5)])


# --------------------------------------------------------------------------------------------
# Neighbour ratios, leakage
# --------------------------------------------------------------------------------------------
def test_meigen_bach_critical_ratios_by_monte_carlo(rng):
    # Amplitude / mean of the 2 adjacent bins, noise only: 2.82 / 4.55 / 8.40 at .05/.01/.001
    # (Meigen & Bach 1999, Doc Ophthalmol 98:207-232; DOMAIN.md [src]).
    N = 400_000
    X = rng.standard_normal((N, 3)) + 1j * rng.standard_normal((N, 3))
    ratio, _ = vs.neighbour_ratio(X, 1, np.array([0, 2]))
    q = np.quantile(ratio, [0.95, 0.99, 0.999])
    assert q[0] == pytest.approx(2.82, abs=0.05)
    assert q[1] == pytest.approx(4.55, abs=0.12)
    assert q[2] == pytest.approx(8.40, abs=0.5)


def test_leakage_whole_vs_non_whole_cycles():
    # DOMAIN.md [calc]: a 1 Hz component over 10.125 s lands at 0.988 Hz with amplitude 0.981
    # and spills into neighbours; over 10 s it sits in one bin.  The amplitude off-bin is
    # sinc(1/8) = 0.9745 plus or minus the negative-frequency image's ~0.005, depending on the
    # phase [calc]; the 0.981 of DOMAIN.md is at the top of that range, so the check is 0.975
    # +- 0.01.
    sr = 200.0
    for win, peak_f, peak_a, tol, spill in ((10.125, 0.988, 0.975, 0.01, True),
                                            (10.0, 1.0, 1.0, 1e-9, False)):
        t = np.arange(int(round(win * sr))) / sr
        for phase in (0.0, 1.0, 2.0):
            X = vs.dft_bins(np.cos(2 * np.pi * 1.0 * t + phase), sr=sr, window=win, n_bins=40)
            k = int(np.argmax(np.abs(X)))
            assert k / win == pytest.approx(peak_f, abs=5e-4)
            assert abs(X[k]) == pytest.approx(peak_a, abs=tol)
            nb = np.abs(X[[k - 1, k + 1]])
            assert (nb.max() > 0.1) if spill else (nb.max() < 1e-9)


def test_dft_bins_explicit_equals_fft(rng):
    x = rng.standard_normal(1600)
    a = vs.dft_bins(x, sr=200.0, window=8.0, n_bins=50)  # FFT path
    b = vs.dft_bins(x[None, :], sr=200.0, window=8.0 + 1e-5, n_bins=50)[0]  # explicit path
    assert np.allclose(a, b, atol=1e-4)


def test_neighbour_bins_skip_structure_and_adjacent():
    nb = vs.neighbour_bins(8, n_total=60, exclude=frozenset(range(0, 60, 4)))
    assert 7 not in nb and 9 not in nb and 4 not in nb and 12 not in nb
    assert nb.size == 8 and np.all(nb >= 1)
    low = vs.neighbour_bins(4, n_total=60, exclude=frozenset(range(0, 60, 4)))
    assert low.size == 8 and 0 not in low  # made up from above near 0 Hz


# --------------------------------------------------------------------------------------------
# Calibration under the null (simulation)
# --------------------------------------------------------------------------------------------
def test_single_tests_are_calibrated(rng):
    # Under the null each p-value is uniform, so P(p < .05) = .05 (definition); 3000 draws give
    # a binomial SE of 0.004.
    n_sim, M, K = 3000, 20, 30
    Z = rng.standard_normal((n_sim, M, K)) + 1j * rng.standard_normal((n_sim, M, K))
    p_ray = vs.rayleigh(Z[:, :, 10], axis=1).p
    p_t2 = vs.t2circ(Z[:, :, 10], axis=1).p
    nb = vs.neighbour_bins(10, n_total=K, exclude=frozenset())
    p_ev = np.array([vs.evoked_test(Z[i].mean(axis=0), k=10, neighbours=nb).p for i in range(n_sim)])
    for p in (p_ray, p_t2, p_ev):
        assert np.mean(p < 0.05) == pytest.approx(0.05, abs=0.015)
        assert stats.kstest(p, "uniform").pvalue > 1e-3


def test_phase_locked_signal_is_found(rng):
    # A weak component of fixed phase in every trial: T2circ and ITPC find what the
    # magnitude average hides (DOMAIN.md "The acoustic check", common practice).
    M, K = 20, 30
    Z = rng.standard_normal((M, K)) + 1j * rng.standard_normal((M, K))
    Z[:, 10] += 2.5  # per-trial amplitude SNR 2.5 / sqrt(2) ~ 5 dB
    assert vs.t2circ(Z[:, 10]).p < 1e-3
    assert vs.rayleigh(Z[:, 10]).p < 1e-3


def test_friedman_matches_scipy(rng):
    # Reference library: scipy.stats.friedmanchisquare (k >= 3, no ties).
    x = rng.standard_normal((40, 4)) + np.array([0, 0.3, 0, 0])
    ours = vs.friedman(x)
    ref = stats.friedmanchisquare(*x.T)
    assert ours.statistic == pytest.approx(ref.statistic)
    assert ours.p == pytest.approx(ref.pvalue)
    assert 0 <= ours.effect <= 1


def test_friedman_two_positions_is_sign_test_chi2(rng):
    # k = 2, no ties: Q = (n_plus - n_minus)^2 / n (sign test chi-square) [calc]
    x = rng.standard_normal((50, 2)) + np.array([0.0, 0.4])
    npos = int(np.sum(x[:, 1] > x[:, 0]))
    q = (npos - (50 - npos)) ** 2 / 50
    assert vs.friedman(x).statistic == pytest.approx(q)


def test_friedman_ties_and_nan():
    x = np.array([[1.0, 1.0, 1.0]] * 10)
    assert vs.friedman(x).p == 1.0  # all tied: no evidence (definition)
    y = np.array([[1.0, 2.0, 3.0]] * 10)
    y[0, 1] = np.nan
    r = vs.friedman(y)
    assert r.n_blocks == 9 and r.effect == pytest.approx(1.0)  # perfect agreement: W = 1


def test_holm_hand_example():
    # p = .01 .04 .03 .005 -> Holm 0.03 0.06 0.06 0.02 (Holm 1979 step-down) [calc]
    assert np.allclose(vs.holm([0.01, 0.04, 0.03, 0.005]), [0.03, 0.06, 0.06, 0.02])
    assert np.isnan(vs.holm([np.nan, 0.2])[0])


def test_fdr_bh_hand_example():
    # p = .01 .04 .03 .005 -> BH q = .02 .04 .04 .02: sorted p x 4/rank = .02 .02 .04 .04,
    # running minimum from the top (Benjamini & Hochberg 1995 step-up) [calc]
    assert np.allclose(vs.fdr_bh([0.01, 0.04, 0.03, 0.005]), [0.02, 0.04, 0.04, 0.02])
    q = vs.fdr_bh(np.array([[0.5, np.nan], [0.01, 0.9]]))
    assert q.shape == (2, 2) and np.isnan(q[0, 1]) and q[1, 1] == pytest.approx(0.9)


def _design():
    grid = grid_from_numbers(unit_duration=0.25, levels=[("line", 4), ("pair", 2)], sr=16000,
                             n_top_groups=4, unit_name="syllable")
    return V.Design(grid=grid, mode="files", source="simulation")


def test_target_bins_cover_each_harmonic_once():
    # 4/1/0.5 Hz over 8 s: line 1,2,3 Hz; pair 0.5,1.5,2.5,3.5 Hz; 4 Hz (unit) excluded [calc]
    tb = _design().grid.target_bins()
    assert sorted(t.bin for t in tb if t.level == "line") == [8, 16, 24]
    assert sorted(t.bin for t in tb if t.level == "pair") == [4, 12, 20, 28]
    assert [t.rate_hz for t in tb if t.level == "line"] == [1.0, 2.0, 3.0]


def test_clean_sets_pass_at_about_alpha(rng):
    """The whole family (spectral + features + joins, Holm) on simulated clean sets.

    Synthetic complex spectra with a smooth, falling noise floor and random feature tables; the
    family-wise false-positive rate must be at most about alpha (Holm guarantees <= alpha;
    correlated tests make it smaller).  alpha = 0.05 so that 300 sets give a usable count.
    """
    d = _design()
    K = d.grid.n_bins_needed()
    scale = 1.0 / np.sqrt(1.0 + np.arange(K) / 8.0)
    alpha, n_sim, hits = 0.05, 300, 0
    for _ in range(n_sim):
        rows = []
        for kind in V.ENVELOPES:
            Z = (rng.standard_normal((20, K)) + 1j * rng.standard_normal((20, K))) * scale
            rows += V.spectral_rows(Z, design=d, condition="c", kind=kind)
        rows += V.feature_rows(rng.standard_normal((20, 32, len(V.FEATURES))), design=d,
                               condition="c")
        rows += V.join_rows(rng.standard_normal((20, 32)), design=d, condition="c")
        V.apply_holm(rows, alpha)
        hits += any(r["significant"] for r in rows)
    rate = hits / n_sim
    # binomial SE at 0.05 over 300 sets is 0.0126: allow 0.01 .. 0.08
    assert 0.01 <= rate <= 0.08, rate


# ---------------------------------------------------------------------------------------------
# Circular differences and sign-flip tests (appended for the response analysis, issue 11)
# ---------------------------------------------------------------------------------------------
def test_wrap_angle_into_half_open_interval():
    # (-pi, pi]: pi stays pi, -pi becomes pi, 3 pi/2 becomes -pi/2 [calc]
    got = vs.wrap_angle(np.array([np.pi, -np.pi, 1.5 * np.pi, 0.25]))
    assert np.allclose(got, [np.pi, np.pi, -0.5 * np.pi, 0.25])


def test_sign_flip_test_exact_values(rng):
    # x = 1, 2, 3: the 8 sign patterns give sums 6, 4, 2, 0, 0, -2, -4, -6; |sum| >= 6 in 2 of
    # 8 -> p = 0.25 two-sided; sum >= 6 in 1 of 8 -> 0.125 one-sided [calc]
    two = vs.sign_flip_test(np.array([1.0, 2.0, 3.0]), rng=rng)
    one = vs.sign_flip_test(np.array([1.0, 2.0, 3.0]), rng=rng, alternative="greater")
    assert two.exact and two.p == pytest.approx(0.25) and two.mean == pytest.approx(2.0)
    assert one.p == pytest.approx(0.125)
    assert vs.sign_flip_test(np.array([-1.0, -2.0, -3.0]), rng=rng,
                             alternative="less").p == pytest.approx(0.125)
    with pytest.raises(vs.StatsError, match="alternative"):
        vs.sign_flip_test(np.ones(3), rng=rng, alternative="bigger")


def test_sign_flip_test_is_calibrated_over_trailing_axes(rng):
    x = rng.standard_normal((12, 2000))  # 2000 null tests in one call, 4096 exact patterns
    res = vs.sign_flip_test(x, rng=rng, n_perm=5000)
    assert res.exact and res.p.shape == (2000,)
    rate = float(np.mean(res.p <= 0.05))
    assert 0.035 <= rate <= 0.065, rate  # binomial SE 0.0049 over 2000 tests; +-3 SE


def test_circular_difference_paired_exact_example(rng):
    # three items, first hearing at 0, second at 30 deg: difference 30 deg; swapping the
    # hearings of k items gives |difference| 30 deg only for k = 0 or 3 -> p = 2/8 [calc]
    u1 = np.ones(3, complex)
    u2 = np.exp(1j * np.deg2rad(30.0)) * np.ones(3)
    res = vs.circular_difference(u1, u2, paired=True, rng=rng)
    assert np.rad2deg(res.difference) == pytest.approx(30.0)
    assert res.exact and res.n_perm == 8 and res.p == pytest.approx(0.25)
    assert res.ci_low <= res.difference <= res.ci_high


def test_circular_difference_recovers_a_shift_and_is_calibrated_unpaired(rng):
    # paired: 20 items with von-Mises-like scatter, second hearing +50 deg
    a = rng.normal(0.0, 0.4, size=20)
    b = a + np.deg2rad(50.0) + rng.normal(0.0, 0.2, size=20)
    res = vs.circular_difference(a, b, paired=True, rng=rng)
    # calc: the paired differences scatter by 0.2 rad (11.5 deg), so their mean over 20 items has
    # an SE of about 2.6 deg: 10 deg is ~4 SE, and a 50 deg shift is ~19 SE from 0 (p << 0.01)
    assert np.rad2deg(res.difference) == pytest.approx(50.0, abs=10.0)
    assert res.ci_low <= np.deg2rad(50.0) <= res.ci_high and res.p < 0.01
    # unpaired null: 500 tests over trailing axes, rejection rate at 0.05 about 0.05
    x = rng.uniform(-np.pi, np.pi, size=(15, 500))
    y = rng.uniform(-np.pi, np.pi, size=(12, 500))
    null = vs.circular_difference(x, y, paired=False, rng=rng, n_perm=400, n_boot=50)
    rate = float(np.mean(null.p <= 0.05))
    assert 0.02 <= rate <= 0.085, rate  # binomial SE 0.0097 over 500 tests: -3 .. +3.6 SE (calc)


def test_circular_one_sample_exact_example(rng):
    # differences 10, 20, 30 deg: mean 20 deg; only all-plus or all-minus reach |mean| 20
    # deg -> p = 2/8 [calc]
    res = vs.circular_one_sample(np.deg2rad([10.0, 20.0, 30.0]), rng=rng)
    assert np.rad2deg(res.difference) == pytest.approx(20.0)
    assert res.exact and res.p == pytest.approx(0.25)
    with pytest.raises(vs.StatsError, match="at least 2"):
        vs.circular_one_sample(np.array([0.1]), rng=rng)
