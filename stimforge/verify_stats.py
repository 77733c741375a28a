"""Statistics of the acoustic check: spectra, phase statistics, rank tests, multiple testing.

Pure functions on arrays, no audio I/O, so that each can be checked against published values
and simulated cheaply (see ``tests/test_verify_stats.py``).

Sources
-------
* ERB and ERB-number: Glasberg & Moore (1990), Hear Res 47:103-138.
* Rayleigh test p-value: Zar, *Biostatistical Analysis*, eq. 27.4 (the closed form
  ``exp(sqrt(1 + 4n + 4(n^2 - R^2)) - (1 + 2n))``, which stays in [0, 1], unlike the older
  small-sample series).
* Hotelling T^2circ: Victor & Mast (1991), EEG Clin Neurophysiol 78:378-388.
* Amplitude against neighbouring bins: Meigen & Bach (1999), Doc Ophthalmol 98:207-232
  (ratio to neighbours); z against neighbours: Liu-Shuang, Norcia & Rossion (2014),
  Neuropsychologia 52:57-72.  For a p-value the check uses the power ratio, which for
  circular Gaussian noise follows F(2, 2m) with m neighbour bins (common practice, the
  "spectral F test").
* Friedman test with tie correction and Kendall's W: Conover, *Practical Nonparametric
  Statistics*, ch. 5.8 (from memory); Holm (1979), Scand J Stat 6:65-70.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

__all__ = [
    "erb",
    "erb_number",
    "erb_space",
    "dft_bins",
    "neighbour_bins",
    "neighbour_ratio",
    "evoked_test",
    "rayleigh",
    "rayleigh_p",
    "t2circ",
    "snr_per_trial",
    "friedman",
    "kruskal",
    "holm",
    "RankTest",
]


# ---------------------------------------------------------------------------------------------
# ERB scale (Glasberg & Moore 1990)
# ---------------------------------------------------------------------------------------------
def erb(f: float | np.ndarray) -> float | np.ndarray:
    """Equivalent rectangular bandwidth, Hz, at centre frequency ``f`` (Hz).

    ``ERB = 24.7 * (4.37 * f / 1000 + 1)`` (Glasberg & Moore 1990).
    """
    return 24.7 * (4.37 * np.asarray(f, dtype=np.float64) / 1000.0 + 1.0)


def erb_number(f: float | np.ndarray) -> float | np.ndarray:
    """ERB-number (Cam), ``21.4 * log10(4.37 * f / 1000 + 1)`` with ``f`` in Hz."""
    return 21.4 * np.log10(4.37 * np.asarray(f, dtype=np.float64) / 1000.0 + 1.0)


def erb_space(low: float, high: float, n: int) -> np.ndarray:
    """``n`` centre frequencies (Hz) from ``low`` to ``high``, equally spaced in ERB-number."""
    if n < 2 or not 0 < low < high:
        raise ValueError(f"erb_space needs n >= 2 and 0 < low < high, got {n}, {low}, {high}")
    e = np.linspace(erb_number(low), erb_number(high), n)
    return (10.0 ** (e / 21.4) - 1.0) / 4.37 * 1000.0


# ---------------------------------------------------------------------------------------------
# Spectra
# ---------------------------------------------------------------------------------------------
def dft_bins(x: np.ndarray, *, sr: float, window: float, n_bins: int) -> np.ndarray:
    """Complex amplitude spectrum at the frequencies ``k / window``, ``k = 0 .. n_bins-1``.

    Parameters
    ----------
    x : ndarray, shape (..., n)
        Segments sampled at ``sr``; the last axis is time, starting at t = 0.
    sr : float, Hz
    window : float, seconds
        Nominal length of the analysed segment; when ``n == window * sr`` this equals the
        FFT (``rfft``) at bins 0 .. n_bins-1.
    n_bins : int

    Returns
    -------
    ndarray, complex, shape (..., n_bins)
        Scaled so that ``a * cos(2 pi f t + phi)`` gives ``a * exp(i phi)`` at its bin
        (``2 / n`` scaling; bin 0 holds twice the mean).
    """
    x = np.asarray(x, dtype=np.float64)
    n = x.shape[-1]
    t = np.arange(n) / float(sr)
    f = np.arange(n_bins) / float(window)
    if abs(n - window * sr) < 1e-6 and n_bins <= n // 2 + 1:
        return np.fft.rfft(x, axis=-1)[..., :n_bins] * (2.0 / n)
    basis = np.exp(-2j * np.pi * np.outer(t, f))
    return (x @ basis) * (2.0 / n)


def neighbour_bins(k: int, *, n_total: int, exclude: set[int] | frozenset[int], skip: int = 1,
                   n_side: int = 4) -> np.ndarray:
    """Indices of the noise bins around bin ``k``.

    The ``n_side`` nearest bins on each side beyond ``skip`` adjacent bins, leaving out
    ``exclude`` (structure bins) and bin 0; a side that runs out (near 0 Hz) is made up from
    the other side so that the count stays ``2 * n_side`` where possible.
    """
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


def neighbour_ratio(amp: np.ndarray, k: int, neighbours: np.ndarray) -> tuple[float, float]:
    """Amplitude ratio ``A_k / mean(A_nb)`` and z ``(A_k - mean) / sd`` against neighbours."""
    a = np.abs(np.asarray(amp))
    nb = a[..., neighbours]
    mean = nb.mean(axis=-1)
    sd = nb.std(axis=-1, ddof=1) if neighbours.size > 1 else np.nan
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = a[..., k] / mean
        z = (a[..., k] - mean) / sd
    return ratio, z


def evoked_test(evoked: np.ndarray, k: int, neighbours: np.ndarray) -> dict[str, float]:
    """Evoked (complex-mean) amplitude at bin ``k`` against its neighbours.

    Returns amplitude, ratio, z (Liu-Shuang et al. 2014 style) and a p-value from the power
    ratio ``|E_k|^2 / mean |E_nb|^2 ~ F(2, 2m)`` (circular Gaussian noise, common practice).
    """
    e = np.asarray(evoked)
    ratio, z = neighbour_ratio(e, k, neighbours)
    p_k = float(np.abs(e[k]) ** 2)
    p_nb = float(np.mean(np.abs(e[neighbours]) ** 2))
    m = int(neighbours.size)
    if p_nb <= 0:
        p = 0.0 if p_k > 0 else 1.0
        fstat = np.inf if p_k > 0 else 0.0
    else:
        fstat = p_k / p_nb
        p = float(stats.f.sf(fstat, 2, 2 * m))
    return {"amplitude": float(np.abs(e[k])), "ratio": float(ratio), "z": float(z),
            "F": float(fstat), "p": p, "noise": float(np.mean(np.abs(e[neighbours])))}


def rayleigh_p(n: int, R: float | np.ndarray) -> float | np.ndarray:
    """Rayleigh test p-value, Zar's formula: ``exp(sqrt(1 + 4n + 4(n^2 - R^2)) - (1 + 2n))``.

    ``R = n * r`` is the length of the resultant of ``n`` unit vectors.
    """
    R = np.asarray(R, dtype=np.float64)
    p = np.exp(np.sqrt(1.0 + 4.0 * n + 4.0 * (n * n - R * R)) - (1.0 + 2.0 * n))
    p = np.clip(p, 0.0, 1.0)
    return float(p) if p.ndim == 0 else p


def rayleigh(z: np.ndarray, axis: int = 0) -> dict[str, np.ndarray | float]:
    """Inter-trial phase coherence and the Rayleigh test.

    Parameters
    ----------
    z : ndarray, complex (or real angles in radians)
        One value per trial along ``axis``; complex values are reduced to their phase.

    Returns
    -------
    dict with ``r`` (ITPC, 0..1), ``mean_angle`` (radians), ``z`` (= n r^2), ``p`` (Zar).
    """
    z = np.asarray(z)
    u = np.exp(1j * z) if not np.iscomplexobj(z) else z / np.where(np.abs(z) > 0, np.abs(z), 1.0)
    n = z.shape[axis]
    m = u.mean(axis=axis)
    r = np.abs(m)
    out = {"r": r, "mean_angle": np.angle(m), "z": n * r * r, "p": rayleigh_p(n, n * r)}
    if np.ndim(r) == 0:
        out = {k: float(v) for k, v in out.items()}
    return out


def t2circ(z: np.ndarray, axis: int = 0) -> dict[str, np.ndarray | float]:
    """Hotelling's T^2circ (Victor & Mast 1991) for a non-zero complex mean.

    ``T2 = (M - 1) |zbar|^2 / sum |z_j - zbar|^2`` and ``M * T2 ~ F(2, 2M - 2)``.
    """
    z = np.asarray(z, dtype=np.complex128)
    M = z.shape[axis]
    if M < 2:
        raise ValueError("T2circ needs at least 2 trials")
    zbar = z.mean(axis=axis)
    dev = np.sum(np.abs(z - np.expand_dims(zbar, axis)) ** 2, axis=axis)
    with np.errstate(divide="ignore", invalid="ignore"):
        t2 = (M - 1) * np.abs(zbar) ** 2 / dev
    t2 = np.where(dev > 0, t2, np.where(np.abs(zbar) > 0, np.inf, 0.0))
    F = M * t2
    p = stats.f.sf(F, 2, 2 * M - 2)
    out = {"T2": t2, "F": F, "p": p, "df": (2, 2 * M - 2)}
    if np.ndim(t2) == 0:
        out = {"T2": float(t2), "F": float(F), "p": float(p), "df": (2, 2 * M - 2)}
    return out


def snr_per_trial(spectra: np.ndarray, k: int, neighbours: np.ndarray) -> float:
    """Magnitude-average SNR in dB: mean over trials of |X_k| / mean |X_nb| (shown only)."""
    a = np.abs(np.asarray(spectra))
    with np.errstate(divide="ignore"):
        ratio = a[:, k].mean() / a[:, neighbours].mean()
        return float(20.0 * np.log10(ratio))


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
    r = stats.rankdata(x, axis=1)
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
    p = float(stats.chi2.sf(Q, k - 1))
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
    H, p = stats.kruskal(*[g for g in gs if g.size])
    return RankTest("kruskal", float(H), len(gs) - 1, float(p), float(H) / (N - 1), N, med)


# ---------------------------------------------------------------------------------------------
# Multiple testing
# ---------------------------------------------------------------------------------------------
def holm(p: np.ndarray | list[float]) -> np.ndarray:
    """Holm (1979) step-down adjusted p-values (monotone, capped at 1); NaN stays NaN."""
    p = np.asarray(p, dtype=np.float64)
    out = np.full(p.shape, np.nan)
    ok = np.isfinite(p)
    q = p[ok]
    m = q.size
    if m == 0:
        return out
    order = np.argsort(q, kind="stable")
    adj = np.empty(m)
    running = 0.0
    for i, idx in enumerate(order):
        running = max(running, min(1.0, (m - i) * q[idx]))
        adj[idx] = running
    out[ok] = adj
    return out
