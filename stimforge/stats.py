"""Spectral and circular statistics shared by the acoustic check and the response analysis.

Pure functions on arrays (no I/O, no pydantic), each checked against published values in
``tests/test_stats.py``.  Conventions: the last axis of a spectrum is frequency (bins); the
trial axis is the keyword-only ``axis`` (default 0); every other axis is carried through, so
the same call serves one envelope (trials x bins) and a recording (trials x channels x bins).
Results are small frozen dataclasses whose fields are floats for one test and arrays over the
leading axes otherwise.  Bad shapes raise :class:`~stimforge.errors.StatsError`.

Sources
-------
* Rayleigh test p-value: Zar, *Biostatistical Analysis*, eq. 27.4 (the closed form
  ``exp(sqrt(1 + 4n + 4(n^2 - R^2)) - (1 + 2n))``, which stays in [0, 1], unlike the older
  small-sample series).
* Hotelling T^2circ: Victor & Mast (1991), EEG Clin Neurophysiol 78:378-388.
* Amplitude against neighbouring bins: Meigen & Bach (1999), Doc Ophthalmol 98:207-232
  (ratio to neighbours); z against neighbours: Liu-Shuang, Norcia & Rossion (2014),
  Neuropsychologia 52:57-72.  For a p-value the power ratio is used, which for circular
  Gaussian noise follows F(2, 2m) with m neighbour bins (common practice, the "spectral F
  test").
* ITPC under the null: ``r sqrt(n)`` is Rayleigh-distributed with sigma = 1/sqrt(2), so
  ``E[r] = sqrt(pi) / (2 sqrt(n))`` (calc).
* Friedman test with tie correction and Kendall's W: Conover, *Practical Nonparametric
  Statistics*, ch. 5.8 (from memory); Holm (1979), Scand J Stat 6:65-70; Benjamini &
  Hochberg (1995), J R Stat Soc B 57:289-300.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import stats as _st

from .errors import StatsError

__all__ = [
    "dft_bins",
    "neighbour_bins",
    "neighbour_ratio",
    "EvokedTest",
    "evoked_test",
    "RayleighTest",
    "rayleigh",
    "rayleigh_p",
    "rayleigh_critical_r",
    "itpc_null_mean",
    "T2CircTest",
    "t2circ",
    "magnitude_snr_db",
    "power_snr",
    "RankTest",
    "friedman",
    "kruskal",
    "holm",
    "fdr_bh",
]


def _out(v: Any) -> Any:
    """A 0-d result as a float, anything else as an ndarray."""
    a = np.asarray(v)
    return float(a) if a.ndim == 0 else a


def _trial_axis(x: np.ndarray, axis: int, *, need: int, what: str) -> np.ndarray:
    """``x`` with the trial axis moved first; at least ``need`` trials."""
    if x.ndim == 0:
        raise StatsError(f"{what}: needs an array with a trial axis, got a scalar")
    try:
        x = np.moveaxis(x, axis, 0)
    except np.exceptions.AxisError as exc:
        raise StatsError(f"{what}: axis={axis} is not an axis of an array of shape "
                         f"{x.shape}") from exc
    if x.shape[0] < need:
        raise StatsError(f"{what} needs at least {need} trials along axis {axis}, "
                         f"got {x.shape[0]}")
    return x


# ---------------------------------------------------------------------------------------------
# Spectra
# ---------------------------------------------------------------------------------------------
def dft_bins(x: np.ndarray, *, sr: float, window: float, n_bins: int) -> np.ndarray:
    """Complex amplitude spectrum at the frequencies ``k / window``, ``k = 0 .. n_bins-1``.

    Parameters
    ----------
    x : ndarray, shape (..., n_times)
        Segments sampled at ``sr``; the last axis is time, starting at t = 0.
    sr : float, Hz
    window : float, seconds
        Nominal length of the analysed segment.  When ``n_times == window * sr`` this is the
        FFT (``rfft``) at bins 0 .. n_bins-1; otherwise (a window that is not a whole number
        of samples, e.g. 0.32 s units at 1024 Hz) the DFT is evaluated at the exact
        frequencies ``k / window`` over the ``n_times`` samples given.
    n_bins : int

    Returns
    -------
    ndarray, complex, shape (..., n_bins)
        Scaled so that ``a * cos(2 pi f t + phi)`` gives ``a * exp(i phi)`` at its bin
        (``2 / n`` scaling; bin 0 holds twice the mean).
    """
    x = np.asarray(x, dtype=np.float64)
    if x.ndim == 0 or x.shape[-1] < 2:
        raise StatsError(f"dft_bins needs segments of at least 2 samples, got shape {x.shape}")
    if not (sr > 0 and window > 0 and n_bins >= 1):
        raise StatsError(f"dft_bins needs sr > 0, window > 0, n_bins >= 1; got {sr}, {window}, "
                         f"{n_bins}")
    n = x.shape[-1]
    if abs(n - window * sr) < 1e-6 and n_bins <= n // 2 + 1:
        return np.fft.rfft(x, axis=-1)[..., :n_bins] * (2.0 / n)
    t = np.arange(n) / float(sr)
    f = np.arange(n_bins) / float(window)
    basis = np.exp(-2j * np.pi * np.outer(t, f))
    return (x @ basis) * (2.0 / n)


def neighbour_bins(k: int, *, n_total: int, exclude: set[int] | frozenset[int], skip: int = 1,
                   n_side: int = 4) -> np.ndarray:
    """Indices of the noise bins around bin ``k``.

    The ``n_side`` nearest bins on each side beyond ``skip`` adjacent bins, leaving out
    ``exclude`` (structure bins) and bin 0; a side that runs out (near 0 Hz) is made up from
    the other side so that the count stays ``2 * n_side`` where possible.
    """
    if skip < 0 or n_side < 1:
        raise StatsError(f"neighbour bins need skip >= 0 and n_side >= 1, got {skip}, {n_side}")
    below, above = [], []
    j = k - skip - 1
    while j >= 1 and len(below) < 2 * n_side:
        if j not in exclude:
            below.append(j)
        j -= 1
    j = k + skip + 1
    while j < n_total and len(above) < 2 * n_side:
        if j not in exclude:
            above.append(j)
        j += 1
    nb = min(len(below), n_side)
    na = min(len(above), 2 * n_side - nb)
    nb = min(len(below), 2 * n_side - na)
    return np.array(sorted(below[:nb] + above[:na]), dtype=int)


def neighbour_ratio(amp: np.ndarray, k: int, neighbours: np.ndarray) -> tuple[Any, Any]:
    """Amplitude ratio ``A_k / mean(A_nb)`` and z ``(A_k - mean) / sd`` against neighbours.

    ``amp`` has bins on its last axis (complex values are taken by magnitude).
    """
    a = np.abs(np.asarray(amp))
    nb = a[..., neighbours]
    mean = nb.mean(axis=-1)
    sd = nb.std(axis=-1, ddof=1) if neighbours.size > 1 else np.nan
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = a[..., k] / mean
        z = (a[..., k] - mean) / sd
    return ratio, z


@dataclass(frozen=True)
class EvokedTest:
    """Evoked amplitude at one bin against its neighbours (floats, or arrays over leading axes).

    ``ratio`` = amplitude / mean neighbour amplitude; ``z`` against the neighbours' mean and
    SD; ``F`` = power / mean neighbour power, ``p`` from F(2, 2m); ``noise`` = mean neighbour
    amplitude.
    """

    amplitude: Any
    ratio: Any
    z: Any
    F: Any
    p: Any
    noise: Any


def evoked_test(spectrum: np.ndarray, *, k: int, neighbours: np.ndarray) -> EvokedTest:
    """Evoked (complex-mean) amplitude at bin ``k`` against its neighbours.

    Parameters
    ----------
    spectrum : ndarray, complex, shape (..., n_bins)
        Spectra already averaged over trials.
    k : int
        The tested bin.
    neighbours : ndarray of int, shape (m,)
        Noise bins (:func:`neighbour_bins`).
    """
    e = np.asarray(spectrum)
    nbr = np.asarray(neighbours, dtype=int)
    if e.ndim == 0 or nbr.size == 0:
        raise StatsError(f"evoked_test needs bins on the last axis and >= 1 neighbour, got "
                         f"shape {e.shape} and {nbr.size} neighbours")
    ratio, z = neighbour_ratio(e, k, nbr)
    p_k = np.abs(e[..., k]) ** 2
    p_nb = np.mean(np.abs(e[..., nbr]) ** 2, axis=-1)
    m = int(nbr.size)
    with np.errstate(divide="ignore", invalid="ignore"):
        fstat = np.where(p_nb > 0, p_k / np.where(p_nb > 0, p_nb, 1.0),
                         np.where(p_k > 0, np.inf, 0.0))
    p = np.where(p_nb > 0, _st.f.sf(fstat, 2, 2 * m), np.where(p_k > 0, 0.0, 1.0))
    return EvokedTest(amplitude=_out(np.abs(e[..., k])), ratio=_out(ratio), z=_out(z),
                      F=_out(fstat), p=_out(p), noise=_out(np.mean(np.abs(e[..., nbr]), axis=-1)))


# ---------------------------------------------------------------------------------------------
# Phase statistics
# ---------------------------------------------------------------------------------------------
def rayleigh_p(n: int, R: float | np.ndarray) -> float | np.ndarray:
    """Rayleigh test p-value, Zar's formula: ``exp(sqrt(1 + 4n + 4(n^2 - R^2)) - (1 + 2n))``.

    ``R = n * r`` is the length of the resultant of ``n`` unit vectors.
    """
    R = np.asarray(R, dtype=np.float64)
    p = np.exp(np.sqrt(1.0 + 4.0 * n + 4.0 * (n * n - R * R)) - (1.0 + 2.0 * n))
    p = np.clip(p, 0.0, 1.0)
    return float(p) if p.ndim == 0 else p


def rayleigh_critical_r(n: int, alpha: float) -> float:
    """The ITPC ``r`` at which Zar's Rayleigh p equals ``alpha`` for ``n`` trials.

    Solves ``exp(sqrt(1 + 4n + 4(n^2 - R^2)) - (1 + 2n)) = alpha`` for ``R = n r``.
    """
    if n < 2 or not 0 < alpha < 1:
        raise StatsError(f"rayleigh_critical_r needs n >= 2 and 0 < alpha < 1, got {n}, {alpha}")
    s = np.log(alpha) + 1.0 + 2.0 * n  # = sqrt(1 + 4n + 4(n^2 - R^2))
    R2 = n * n + (1.0 + 4.0 * n - s * s) / 4.0
    return float(np.sqrt(max(R2, 0.0)) / n)


def itpc_null_mean(n: int | np.ndarray) -> float | np.ndarray:
    """Expected ITPC of ``n`` random phases: ``sqrt(pi) / (2 sqrt(n))`` (0.198 for n = 20)."""
    return _out(np.sqrt(np.pi) / (2.0 * np.sqrt(np.asarray(n, dtype=np.float64))))


@dataclass(frozen=True)
class RayleighTest:
    """Inter-trial phase coherence ``r`` (0..1), ``mean_angle`` (radians), ``z = n r^2``, ``p``."""

    r: Any
    mean_angle: Any
    z: Any
    p: Any
    n: int


def rayleigh(z: np.ndarray, *, axis: int = 0) -> RayleighTest:
    """Inter-trial phase coherence and the Rayleigh test (Zar).

    Parameters
    ----------
    z : ndarray, complex (or real angles in radians)
        One value per trial along ``axis``; complex values are reduced to their phase.
    """
    z = _trial_axis(np.asarray(z), axis, need=1, what="rayleigh")
    u = np.exp(1j * z) if not np.iscomplexobj(z) else z / np.where(np.abs(z) > 0, np.abs(z), 1.0)
    n = z.shape[0]
    m = u.mean(axis=0)
    r = np.abs(m)
    return RayleighTest(r=_out(r), mean_angle=_out(np.angle(m)), z=_out(n * r * r),
                        p=_out(rayleigh_p(n, n * r)), n=int(n))


@dataclass(frozen=True)
class T2CircTest:
    """Hotelling's T^2circ: statistic ``T2``, ``F = M T2`` on ``df`` = (2, 2M - 2), ``p``."""

    T2: Any
    F: Any
    p: Any
    df: tuple[int, int]


def t2circ(z: np.ndarray, *, axis: int = 0) -> T2CircTest:
    """Hotelling's T^2circ (Victor & Mast 1991) for a non-zero complex mean.

    ``T2 = (M - 1) |zbar|^2 / sum |z_j - zbar|^2`` and ``M * T2 ~ F(2, 2M - 2)``.
    """
    z = _trial_axis(np.asarray(z, dtype=np.complex128), axis, need=2, what="T2circ")
    M = z.shape[0]
    zbar = z.mean(axis=0)
    dev = np.sum(np.abs(z - zbar[None]) ** 2, axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        t2 = (M - 1) * np.abs(zbar) ** 2 / dev
    t2 = np.where(dev > 0, t2, np.where(np.abs(zbar) > 0, np.inf, 0.0))
    F = M * t2
    p = _st.f.sf(F, 2, 2 * M - 2)
    return T2CircTest(T2=_out(t2), F=_out(F), p=_out(p), df=(2, 2 * M - 2))


# ---------------------------------------------------------------------------------------------
# Single-trial measures (shown beside the evoked ones)
# ---------------------------------------------------------------------------------------------
def magnitude_snr_db(spectra: np.ndarray, *, k: int, neighbours: np.ndarray,
                     axis: int = 0) -> float | np.ndarray:
    """Magnitude-average SNR in dB: mean over trials of |X_k| over mean |X_nb| (phase-blind)."""
    a = _trial_axis(np.abs(np.asarray(spectra)), axis, need=1, what="magnitude_snr_db")
    with np.errstate(divide="ignore"):
        num = a[..., k].mean(axis=0)
        den = a[..., neighbours].mean(axis=(0, -1)) if a.ndim > 2 else a[:, neighbours].mean()
        return _out(20.0 * np.log10(num / den))


def power_snr(spectra: np.ndarray, *, k: int, neighbours: np.ndarray,
              axis: int = 0) -> float | np.ndarray:
    """Mean single-trial power SNR: mean over trials of |X_k|^2 over mean |X_nb|^2 (linear).

    The common practice in frequency-tagging EEG: power per trial, averaged, against the
    neighbouring bins.  Noise inflates it (its null expectation is 1) and it is blind to
    phase, so report it beside the evoked measure, not instead of it.
    """
    pw = _trial_axis(np.abs(np.asarray(spectra)) ** 2, axis, need=1, what="power_snr")
    with np.errstate(divide="ignore", invalid="ignore"):
        return _out(pw[..., k].mean(axis=0) / pw[..., neighbours].mean(axis=(0, -1)))


# ---------------------------------------------------------------------------------------------
# Rank tests across positions
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class RankTest:
    """Result of a rank test across positions."""

    test: str
    statistic: float
    df: int
    p: float
    effect: float  # Kendall's W (Friedman) or epsilon^2 (Kruskal-Wallis)
    n_blocks: int
    medians: tuple[float, ...]

    def __repr__(self) -> str:
        return (f"RankTest({self.test}, stat={self.statistic:.3g}, df={self.df}, "
                f"p={self.p:.3g}, effect={self.effect:.3g}, n={self.n_blocks})")


def friedman(table: np.ndarray) -> RankTest:
    """Friedman test across columns (positions), rows are blocks; tie-corrected.

    Rows holding NaN are dropped.  Works for 2 or more columns (scipy's version needs 3).
    The effect size is Kendall's W = Q / (n (k - 1)).
    """
    x = np.asarray(table, dtype=np.float64)
    x = x[np.all(np.isfinite(x), axis=1)]
    n, k = x.shape if x.ndim == 2 else (0, 0)
    med = tuple(float(v) for v in (np.median(x, axis=0) if n else np.full(k, np.nan)))
    if n < 2 or k < 2:
        return RankTest("friedman", float("nan"), max(k - 1, 0), 1.0, float("nan"), n, med)
    r = _st.rankdata(x, axis=1)
    Rj = r.sum(axis=0)
    # Tie correction: sum over blocks of (t^3 - t) over tie groups.
    ties = 0.0
    xs = np.sort(x, axis=1)
    tied_rows = np.flatnonzero(np.any(xs[:, 1:] == xs[:, :-1], axis=1))
    for i in tied_rows:
        _, counts = np.unique(xs[i], return_counts=True)
        ties += float(np.sum(counts ** 3 - counts))
    denom = 1.0 - ties / (n * (k ** 3 - k))
    if denom <= 1e-12:
        return RankTest("friedman", 0.0, k - 1, 1.0, 0.0, n, med)
    Q = (12.0 / (n * k * (k + 1)) * float(np.sum(Rj ** 2)) - 3.0 * n * (k + 1)) / denom
    Q = max(Q, 0.0)
    p = float(_st.chi2.sf(Q, k - 1))
    return RankTest("friedman", Q, k - 1, p, Q / (n * (k - 1)), n, med)


def kruskal(groups: list[np.ndarray]) -> RankTest:
    """Kruskal-Wallis across groups (NaN dropped); effect size epsilon^2 = H / (N - 1)."""
    gs = [np.asarray(g, dtype=np.float64) for g in groups]
    gs = [g[np.isfinite(g)] for g in gs]
    med = tuple(float(np.median(g)) if g.size else float("nan") for g in gs)
    N = sum(g.size for g in gs)
    if sum(1 for g in gs if g.size) < 2 or N < 3:
        return RankTest("kruskal", float("nan"), len(gs) - 1, 1.0, float("nan"), N, med)
    allv = np.concatenate(gs)
    if np.all(allv == allv[0]):
        return RankTest("kruskal", 0.0, len(gs) - 1, 1.0, 0.0, N, med)
    H, p = _st.kruskal(*[g for g in gs if g.size])
    return RankTest("kruskal", float(H), len(gs) - 1, float(p), float(H) / (N - 1), N, med)


# ---------------------------------------------------------------------------------------------
# Multiple testing
# ---------------------------------------------------------------------------------------------
def _adjusted(p: np.ndarray | list[float], adjust) -> np.ndarray:
    """Apply ``adjust`` (sorted finite p -> adjusted, same order) to the finite values of ``p``."""
    p = np.asarray(p, dtype=np.float64)
    out = np.full(p.shape, np.nan)
    ok = np.isfinite(p)
    q = p[ok]
    if q.size == 0:
        return out
    order = np.argsort(q, kind="stable")
    res = np.empty(q.size)
    res[order] = adjust(q[order])
    out[ok] = res
    return out


def _holm_sorted(q: np.ndarray) -> np.ndarray:
    m = q.size
    adj = np.empty(m)
    running = 0.0
    for i in range(m):
        running = max(running, min(1.0, (m - i) * q[i]))
        adj[i] = running
    return adj


def _bh_sorted(q: np.ndarray) -> np.ndarray:
    m = q.size
    scaled = q * m / np.arange(1, m + 1)
    return np.minimum(np.minimum.accumulate(scaled[::-1])[::-1], 1.0)


def holm(p: np.ndarray | list[float]) -> np.ndarray:
    """Holm (1979) step-down adjusted p-values (monotone, capped at 1); NaN stays NaN.

    Works on any shape: the family is every finite value of ``p``.
    """
    return _adjusted(p, _holm_sorted)


def fdr_bh(p: np.ndarray | list[float]) -> np.ndarray:
    """Benjamini-Hochberg (1995) adjusted p-values (q-values), capped at 1; NaN stays NaN.

    Works on any shape: the family is every finite value of ``p``.
    """
    return _adjusted(p, _bh_sorted)


# ---------------------------------------------------------------------------------------------
# Circular differences and sign-flip tests (the response analysis: phase across hearings and
# across participants).  Appended for issue 11; every function works over trailing axes: the
# first axis holds the pairs, trials or participants, all others are carried through.
# ---------------------------------------------------------------------------------------------
__all__ += ["wrap_angle", "CircularDifference", "circular_difference",
            "circular_one_sample", "SignFlipTest", "sign_flip_test"]


def wrap_angle(a: Any) -> Any:
    """Angles (radians) wrapped into (-pi, pi]."""
    w = np.pi - np.mod(np.pi - np.asarray(a, dtype=np.float64), 2.0 * np.pi)
    return _out(w)


def _phasors(z: np.ndarray, what: str, *, need: int) -> np.ndarray:
    """Unit phasors (n, K) from complex values or real angles (radians), first axis kept."""
    z = np.asarray(z)
    if z.ndim == 0 or z.shape[0] < need:
        raise StatsError(f"{what} needs at least {need} values along its first axis, got shape "
                         f"{z.shape}")
    if np.iscomplexobj(z):
        mag = np.abs(z)
        u = z / np.where(mag > 0, mag, 1.0)
    else:
        u = np.exp(1j * z.astype(np.float64))
    return u.reshape(z.shape[0], -1).astype(np.complex128)


def _all_flips(n: int) -> np.ndarray:
    """Every 0/1 pattern of length n, shape (2**n, n)."""
    codes = np.arange(2 ** n, dtype=np.int64)[:, None]
    return ((codes >> np.arange(n, dtype=np.int64)[None, :]) & 1).astype(np.float64)


def _flips(n: int, n_perm: int, rng: np.random.Generator) -> tuple[np.ndarray, bool]:
    """0/1 flip patterns: all of them when 2**n <= n_perm (exact test), else n_perm random."""
    if n <= 20 and 2 ** n <= n_perm:
        return _all_flips(n), True
    return rng.integers(0, 2, size=(n_perm, n)).astype(np.float64), False


def _perm_p(stat: np.ndarray, obs: np.ndarray, exact: bool) -> np.ndarray:
    """p from a permutation distribution ``stat`` (R, K) and observed ``obs`` (K,)."""
    tol = 1e-12 * np.maximum(1.0, np.abs(obs))
    ge = np.sum(stat >= obs[None, :] - tol[None, :], axis=0)
    if exact:  # the identity is one of the patterns
        return ge / stat.shape[0]
    return (1.0 + ge) / (1.0 + stat.shape[0])


def _boot_ci(boot: np.ndarray, centre: np.ndarray, alpha: float) -> tuple[np.ndarray, np.ndarray]:
    """Percentile interval of circular bootstrap values around ``centre`` (radians)."""
    dev = np.asarray(wrap_angle(boot - centre[None, :]))
    lo = centre + np.quantile(dev, alpha / 2.0, axis=0)
    hi = centre + np.quantile(dev, 1.0 - alpha / 2.0, axis=0)
    return lo, hi


@dataclass(frozen=True)
class CircularDifference:
    """A phase difference ``second - first`` with its bootstrap interval and permutation p.

    Angles in radians (floats for one test, arrays over the trailing axes otherwise).
    ``difference`` is wrapped into (-pi, pi]; ``ci_low <= difference <= ci_high`` (the
    interval is taken around the estimate, so its ends may pass +-pi); ``p`` is two-sided
    (|difference| as extreme as observed when the hearings are exchangeable); ``n`` counts
    pairs (paired) or the smaller group (unpaired); ``exact`` is True when every permutation
    was enumerated.
    """

    difference: Any
    ci_low: Any
    ci_high: Any
    p: Any
    mean_first: Any
    mean_second: Any
    n: int
    paired: bool
    exact: bool
    n_boot: int
    n_perm: int


def circular_difference(first: np.ndarray, second: np.ndarray, *, paired: bool,
                        rng: np.random.Generator, n_boot: int = 2000, n_perm: int = 2000,
                        alpha: float = 0.05) -> CircularDifference:
    """Difference of two circular means, with a bootstrap interval and a permutation test.

    Parameters
    ----------
    first, second : ndarray, complex (or real angles in radians), shape (n, ...)
        One value per item (paired: row i of both is the same item) or per trial (unpaired:
        the two may differ in length).  Complex values are reduced to their phase, so the
        circular mean is the angle of the mean unit vector.
    paired : bool
        Paired: the bootstrap resamples items (both values of an item together) and the
        permutation swaps the two values within items (all 2**n swaps when
        ``2**n <= n_perm``).  Unpaired: each group is resampled on its own and the
        permutation reshuffles the pooled values.
    rng : numpy.random.Generator
    n_boot, n_perm : int
        Bootstrap resamples and permutations.
    alpha : float
        1 - coverage of the percentile interval (0.05: 95 %).

    Returns
    -------
    CircularDifference
        Angles in radians over the trailing axes of the input.
    """
    if n_boot < 10 or n_perm < 10 or not 0 < alpha < 1:
        raise StatsError(f"circular_difference needs n_boot, n_perm >= 10 and 0 < alpha < 1, "
                         f"got {n_boot}, {n_perm}, {alpha}")
    shape = np.asarray(first).shape[1:]
    u1 = _phasors(first, "circular_difference (first)", need=2)
    u2 = _phasors(second, "circular_difference (second)", need=2)
    if u1.shape[1] != u2.shape[1] or (paired and u1.shape[0] != u2.shape[0]):
        raise StatsError(f"circular_difference: shapes {np.asarray(first).shape} and "
                         f"{np.asarray(second).shape} do not match"
                         + (" (paired: one row per item in both)" if paired else ""))
    m1, m2 = u1.sum(axis=0), u2.sum(axis=0)
    d = np.angle(m2 * np.conj(m1))
    n1, n2 = u1.shape[0], u2.shape[0]
    if paired:
        w = rng.multinomial(n1, np.full(n1, 1.0 / n1), size=n_boot).astype(np.float64)
        bd = np.angle((w @ u2) * np.conj(w @ u1))
        flips, exact = _flips(n1, n_perm, rng)
        diff = u2 - u1
        sw = flips @ diff
        pd = np.angle((m2 - sw) * np.conj(m1 + sw))
    else:
        w1 = rng.multinomial(n1, np.full(n1, 1.0 / n1), size=n_boot).astype(np.float64)
        w2 = rng.multinomial(n2, np.full(n2, 1.0 / n2), size=n_boot).astype(np.float64)
        bd = np.angle((w2 @ u2) * np.conj(w1 @ u1))
        pooled = np.concatenate([u1, u2], axis=0)
        keys = rng.random((n_perm, n1 + n2))
        pick = (np.argsort(keys, axis=1) < n1).astype(np.float64)  # n1 ones per row
        g1 = pick @ pooled
        pd = np.angle((m1 + m2 - g1) * np.conj(g1))
        exact = False
    lo, hi = _boot_ci(bd, d, alpha)
    p = _perm_p(np.abs(pd), np.abs(d), exact)
    rs = (lambda a: _out(np.asarray(a).reshape(shape)))
    return CircularDifference(difference=rs(d), ci_low=rs(lo), ci_high=rs(hi), p=rs(p),
                              mean_first=rs(np.angle(m1)), mean_second=rs(np.angle(m2)),
                              n=int(n1 if paired else min(n1, n2)), paired=bool(paired),
                              exact=bool(exact), n_boot=int(n_boot),
                              n_perm=int(flips.shape[0] if paired else n_perm))


def circular_one_sample(d: np.ndarray, *, rng: np.random.Generator, n_boot: int = 2000,
                        n_perm: int = 10000, alpha: float = 0.05) -> CircularDifference:
    """Is the circular mean of angular differences away from 0?  Sign-flip test + bootstrap.

    For per-participant phase differences (second - first hearing): under the null the two
    hearings are exchangeable within each participant, so each difference is as likely to be
    ``+d`` as ``-d``.  The statistic is |circular mean| of the differences; the null
    distribution flips the signs (all 2**n patterns when ``2**n <= n_perm``).  The interval
    is a bootstrap over participants.

    Parameters
    ----------
    d : ndarray, real angles in radians (or complex), shape (n, ...)

    Returns
    -------
    CircularDifference
        ``difference`` is the circular mean of ``d``; ``mean_first`` is 0 and
        ``mean_second`` the same mean.
    """
    if n_boot < 10 or n_perm < 10 or not 0 < alpha < 1:
        raise StatsError(f"circular_one_sample needs n_boot, n_perm >= 10 and 0 < alpha < 1, "
                         f"got {n_boot}, {n_perm}, {alpha}")
    shape = np.asarray(d).shape[1:]
    v = _phasors(d, "circular_one_sample", need=2)
    n = v.shape[0]
    tot = v.sum(axis=0)
    mean = np.angle(tot)
    w = rng.multinomial(n, np.full(n, 1.0 / n), size=n_boot).astype(np.float64)
    lo, hi = _boot_ci(np.angle(w @ v), mean, alpha)
    flips, exact = _flips(n, n_perm, rng)
    flipped = tot[None, :] + flips @ (np.conj(v) - v)
    p = _perm_p(np.abs(np.angle(flipped)), np.abs(mean), exact)
    rs = (lambda a: _out(np.asarray(a).reshape(shape)))
    return CircularDifference(difference=rs(mean), ci_low=rs(lo), ci_high=rs(hi), p=rs(p),
                              mean_first=rs(np.zeros(v.shape[1])), mean_second=rs(mean), n=int(n),
                              paired=True, exact=bool(exact), n_boot=int(n_boot),
                              n_perm=int(flips.shape[0]))


@dataclass(frozen=True)
class SignFlipTest:
    """One-sample sign-flip permutation test of a mean against 0 (paired differences)."""

    mean: Any
    p: Any
    n: int
    exact: bool
    alternative: str


def sign_flip_test(x: np.ndarray, *, rng: np.random.Generator, n_perm: int = 10000,
                   alternative: str = "two-sided") -> SignFlipTest:
    """Sign-flip permutation test of ``mean(x) = 0`` over the first axis.

    For paired differences (e.g. a condition contrast per participant): under the null each
    difference is symmetric about 0, so flipping its sign leaves the distribution unchanged.
    All 2**n patterns are used when ``2**n <= n_perm`` (exact), else ``n_perm`` random ones
    (p = (1 + count) / (1 + n_perm)).  NaN rows are not allowed.

    Parameters
    ----------
    x : ndarray, float, shape (n, ...)
    alternative : {"two-sided", "greater", "less"}
    """
    if alternative not in ("two-sided", "greater", "less"):
        raise StatsError(f"sign_flip_test: alternative must be 'two-sided', 'greater' or "
                         f"'less', got {alternative!r}")
    x = np.asarray(x, dtype=np.float64)
    if x.ndim == 0 or x.shape[0] < 2:
        raise StatsError(f"sign_flip_test needs at least 2 values along axis 0, got shape "
                         f"{x.shape}")
    if not np.all(np.isfinite(x)):
        raise StatsError("sign_flip_test: x holds NaN or infinite values")
    shape = x.shape[1:]
    xf = x.reshape(x.shape[0], -1)
    n = xf.shape[0]
    flips, exact = _flips(n, n_perm, rng)
    signs = 1.0 - 2.0 * flips
    stat = signs @ xf / n
    obs = xf.mean(axis=0)
    if alternative == "two-sided":
        p = _perm_p(np.abs(stat), np.abs(obs), exact)
    elif alternative == "greater":
        p = _perm_p(stat, obs, exact)
    else:
        p = _perm_p(-stat, -obs, exact)
    return SignFlipTest(mean=_out(obs.reshape(shape)), p=_out(np.asarray(p).reshape(shape)),
                        n=int(n), exact=bool(exact), alternative=alternative)
