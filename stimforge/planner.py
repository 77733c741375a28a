"""How many trials and participants a study needs: power by simulation at the design's trial length.

The simulation works on the complex DFT values at the tested bin, which is exact for a
phase-locked response in stationary Gaussian noise: over a window of whole cycles the DFT
bins of such noise are independent complex Gaussians, so one trial at the bin is
``sqrt(gamma) exp(i phi_p) + N``, ``N ~ CN(0, 1)``.  ``gamma`` is the single-trial power
signal-to-noise ratio at the bin **over the design's analysed window** (longer trials collect
more signal per bin: ``gamma`` grows in proportion to the window for white noise).  The phase
``phi_p`` differs between participants (each brain has its own latency), so the group test
cannot rely on a shared phase.

Tests simulated are the ones :func:`stimforge.response.analyze` runs:

* per participant: the finding's test (``"t2circ"`` by default, or ``"itpc"`` / ``"evoked"``)
  at ``alpha / n_tests`` -- the first step of Holm over a family of ``n_tests`` (channels x
  rates), which is what a single true response must pass;
* group: the one-sided one-sample t-test of per-participant ITPC minus its null expectation
  ``sqrt(pi) / (2 sqrt(n))``, at ``alpha / n_tests``.

The response size can be given as

* ``snr``: the mean single-trial power SNR that ``analyze`` reports (``power_snr``, linear;
  1 = no response), so ``gamma = snr - 1``; from a pilot with another window length, give
  ``pilot_window`` and it is rescaled by ``window / pilot_window``;
* ``itpc``: the expected single-trial phase coherence of the response; ``gamma`` solves
  ``itpc = sqrt(pi gamma) / 2 * exp(-gamma/2) (I0(gamma/2) + I1(gamma/2))`` (the mean
  resultant length of a constant phasor in complex Gaussian noise, calc);
* ``amplitude`` and ``noise_sd`` (same unit) with ``sfreq``: a sinusoid of that amplitude in
  white noise of that per-sample SD; ``gamma = amplitude^2 n / (4 noise_sd^2)`` with
  ``n = window * sfreq`` samples (2/n scaling of the DFT, calc).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from . import stats
from ._version import __version__
from .errors import AnalysisError
from .grid import RateTable

__all__ = ["PowerPlan", "plan_power", "gamma_from_itpc", "itpc_from_gamma", "DEFAULT_TRIALS",
           "DEFAULT_PARTICIPANTS", "SCHEMA_VERSION"]

SCHEMA_VERSION = 1
DEFAULT_TRIALS = (10, 20, 30, 40, 60, 80, 100, 120, 160, 200)
DEFAULT_PARTICIPANTS = (4, 8, 12, 16, 20, 24, 28, 32, 40, 48)


def itpc_from_gamma(gamma: float | np.ndarray) -> float | np.ndarray:
    """Expected single-trial ITPC of a constant phasor in complex Gaussian noise.

    ``gamma`` = |A|^2 / E|N|^2.  Uses exponentially scaled Bessel functions for stability.
    """
    from scipy.special import ive

    g = np.asarray(gamma, dtype=np.float64)
    r = np.sqrt(np.pi * g) / 2.0 * (ive(0, g / 2.0) + ive(1, g / 2.0))
    return float(r) if r.ndim == 0 else r


def gamma_from_itpc(itpc: float) -> float:
    """Inverse of :func:`itpc_from_gamma` (0 < itpc < 1)."""
    from scipy.optimize import brentq

    if not 0 < itpc < 1:
        raise AnalysisError(f"--itpc must be between 0 and 1 (exclusive), got {itpc}")
    hi = 1.0
    while itpc_from_gamma(hi) < itpc:
        hi *= 4.0
        if hi > 1e8:
            raise AnalysisError(f"--itpc {itpc}: too close to 1 to simulate")
    return float(brentq(lambda g: itpc_from_gamma(g) - itpc, 0.0, hi, xtol=1e-12))


@dataclass(frozen=True, repr=False)
class PowerPlan:
    """Simulated power over a grid of trials per participant x participants.

    Attributes
    ----------
    rows : list of dict
        ``n_trials, n_participants, power_group, power_participant`` (and their Monte Carlo
        standard errors ``se_group, se_participant``).
    trials, participants : tuple of int
    design : dict
        ``level, harmonic, rate_hz, window_s, n_tests``.
    effect : dict
        ``gamma`` (single-trial power SNR at the bin minus 1), ``power_snr``, ``itpc`` and
        what was given.
    settings : dict
        ``alpha, power, test, n_sim, seed``.
    recommendation : dict
        ``trials_per_participant`` (fewest trials for one participant to show the response
        with the asked power; None if none in the grid), ``participants_by_trials``
        {trials: fewest participants for the group test, or None}, ``cheapest``
        {n_trials, n_participants, total_trials} or None.
    seconds : float
    """

    rows: list[dict]
    trials: tuple[int, ...]
    participants: tuple[int, ...]
    design: dict[str, Any]
    effect: dict[str, Any]
    settings: dict[str, Any]
    recommendation: dict[str, Any]
    seconds: float

    def _cell(self, T: int, P: int, key: str) -> float:
        for r in self.rows:
            if r["n_trials"] == T and r["n_participants"] == P:
                return r[key]
        raise KeyError((T, P))

    @property
    def table(self):
        """Group power as a DataFrame: rows = trials per participant, columns = participants."""
        import pandas as pd

        df = pd.DataFrame(self.rows).pivot(index="n_trials", columns="n_participants",
                                           values="power_group")
        df["one participant"] = [self._cell(T, self.participants[0], "power_participant")
                                 for T in df.index]
        return df

    def format_table(self) -> str:
        head = f"{'trials':>7} {'1 part.':>8} |" + "".join(f"{P:>6}" for P in self.participants)
        out = [f"group power (participants across) and one participant's power, "
               f"{self.design['level']} {self.design['rate_hz']:.4g} Hz", head,
               "-" * len(head)]
        for T in self.trials:
            out.append(f"{T:>7} {self._cell(T, self.participants[0], 'power_participant'):>8.2f} |"
                       + "".join(f"{self._cell(T, P, 'power_group'):>6.2f}"
                                 for P in self.participants))
        return "\n".join(out)

    def summary_line(self) -> str:
        rec = self.recommendation
        s = self.settings
        tp = rec["trials_per_participant"]
        ch = rec["cheapest"]
        a = (f"single-trial power SNR {self.effect['power_snr']:.3g} (expected ITPC "
             f"{self.effect['itpc']:.3g}) over {self.design['window_s']:g} s trials, alpha "
             f"{s['alpha']:g} / {self.design['n_tests']} tests, power {s['power']:g}: ")
        a += (f"one participant needs {tp} trials" if tp else
              f"one participant does not reach it with {max(self.trials)} trials")
        a += ("; the group test needs " + f"{ch['n_participants']} participants x "
              f"{ch['n_trials']} trials (fewest trials in all)" if ch else
              "; the group test does not reach it within the grid")
        return a

    def __repr__(self) -> str:
        return f"<PowerPlan {self.summary_line()}>"

    def _repr_html_(self) -> str:
        import html

        return (f"<p>{html.escape(self.summary_line())}</p>" + self.table.to_html(
            float_format=lambda v: f"{v:.2f}"))

    def to_dict(self) -> dict[str, Any]:
        return {"schema_version": SCHEMA_VERSION, "kind": "stimforge power plan",
                "stimforge_version": __version__, "design": self.design, "effect": self.effect,
                "settings": self.settings, "rows": self.rows,
                "recommendation": {**self.recommendation, "participants_by_trials": {
                    str(k): v for k, v in self.recommendation["participants_by_trials"].items()}},
                "summary": self.summary_line()}

    def write_json(self, path: str | Path) -> Path:
        from .audio_io import json_dumps

        path = Path(path)
        path.write_text(json_dumps(self.to_dict(), sort_keys=False), encoding="utf-8")
        return path

    def plot(self):
        """Power curves: group power against participants (one line per trial count), and one
        participant's power against trials.  Returns a :class:`matplotlib.figure.Figure`."""
        from matplotlib import colormaps
        from matplotlib.figure import Figure

        fig = Figure(figsize=(12.0, 4.2), dpi=100, layout="constrained")
        ax1, ax2 = fig.subplots(1, 2, width_ratios=[1.6, 1.0])
        cmap = colormaps["viridis"]
        for i, T in enumerate(self.trials):
            y = [self._cell(T, P, "power_group") for P in self.participants]
            ax1.plot(self.participants, y, "o-", ms=3.5, lw=1.3,
                     color=cmap(i / max(1, len(self.trials) - 1)), label=f"{T} trials")
        for ax in (ax1, ax2):
            ax.axhline(self.settings["power"], color="k", ls="--", lw=0.9)
            ax.set_ylim(-0.02, 1.02)
            ax.grid(alpha=0.3)
        ax1.set_xlabel("participants")
        ax1.set_ylabel("power of the group test")
        ax1.legend(fontsize=7.5, ncols=2, loc="lower right")
        ax1.set_title(f"{self.design['level']} {self.design['rate_hz']:.4g} Hz, "
                      f"{self.design['window_s']:g} s trials, single-trial power SNR "
                      f"{self.effect['power_snr']:.3g}", loc="left", fontsize=10)
        y2 = [self._cell(T, self.participants[0], "power_participant") for T in self.trials]
        ax2.plot(self.trials, y2, "s-", color="#c0392b")
        ax2.set_xlabel("trials per participant")
        ax2.set_ylabel("power for one participant")
        ax2.set_title(f"{self.settings['test']} at alpha {self.settings['alpha']:g} / "
                      f"{self.design['n_tests']}", loc="left", fontsize=10)
        return fig


def _gamma(*, snr, snr_db, itpc, amplitude, noise_sd, sfreq, window, pilot_window
           ) -> tuple[float, dict[str, Any]]:
    given = [snr is not None, snr_db is not None, itpc is not None,
             amplitude is not None or noise_sd is not None]
    if sum(given) != 1:
        raise AnalysisError("give the response size one way: --snr (mean single-trial power "
                            "SNR, linear), --snr-db, --itpc, or --amplitude with --noise and "
                            "--sfreq")
    info: dict[str, Any] = {}
    if snr_db is not None:
        snr = 10 ** (snr_db / 10.0)
        info["snr_db"] = snr_db
    if snr is not None:
        if not snr > 1:
            raise AnalysisError(f"--snr must be > 1 (1 = no response; it is the mean "
                                f"single-trial power ratio to the noise bins), got {snr:g}")
        g = snr - 1.0
        info["snr_given"] = snr
        if pilot_window is not None:
            if not pilot_window > 0:
                raise AnalysisError(f"--pilot-window must be > 0 s, got {pilot_window}")
            g *= window / pilot_window
            info["pilot_window_s"] = pilot_window
    elif itpc is not None:
        g = gamma_from_itpc(itpc)
        info["itpc_given"] = itpc
    else:
        if amplitude is None or noise_sd is None or sfreq is None:
            raise AnalysisError("--amplitude needs --noise (per-sample SD, same unit) and "
                                "--sfreq (Hz)")
        if not (amplitude > 0 and noise_sd > 0 and sfreq > 0):
            raise AnalysisError("--amplitude, --noise and --sfreq must be > 0")
        n = window * sfreq
        g = amplitude ** 2 * n / (4.0 * noise_sd ** 2)
        info.update(amplitude=amplitude, noise_sd=noise_sd, sfreq=sfreq)
    info.update(gamma=g, power_snr=1.0 + g, itpc=itpc_from_gamma(g))
    return float(g), info


def _check_grid(values: Sequence[int], name: str, low: int) -> tuple[int, ...]:
    v = tuple(sorted({int(x) for x in values}))
    if not v or v[0] < low or any(int(x) != x for x in values):
        raise AnalysisError(f"{name}: whole numbers >= {low} please, got {list(values)}")
    return v


def plan_power(rates: RateTable, *, level: str | None = None, harmonic: int = 1,
               snr: float | None = None, snr_db: float | None = None, itpc: float | None = None,
               amplitude: float | None = None, noise_sd: float | None = None,
               sfreq: float | None = None, pilot_window: float | None = None,
               trials: Sequence[int] = DEFAULT_TRIALS,
               participants: Sequence[int] = DEFAULT_PARTICIPANTS, alpha: float = 0.05,
               power: float = 0.8, n_tests: int | None = None, test: str = "t2circ",
               n_sim: int = 1000, n_side: int = 4, rng: np.random.Generator | int | None = None
               ) -> PowerPlan:
    """Power of one participant's test and of the group test, by simulation.

    Parameters
    ----------
    rates : RateTable
        The design; its analysed window is the trial length simulated.
    level : str, optional
        The level whose rate is planned for (default: the slowest).
    harmonic : int
    snr, snr_db, itpc, amplitude, noise_sd, sfreq, pilot_window
        The response size, one way (see the module docstring).
    trials, participants : sequence of int
        The grid (default 10 x 10).
    alpha : float
    power : float
        The power asked for (the recommendation uses it).
    n_tests : int, optional
        Tests in the correction family (channels x rates); default: the design's structure
        rates on one channel.
    test : {"t2circ", "itpc", "evoked"}
    n_sim : int
        Simulated studies per cell (Monte Carlo SE <= 0.5 / sqrt(n_sim)).
    n_side : int
        Noise bins per side (the evoked test uses 2 n_side).
    rng : int or Generator, optional

    Returns
    -------
    PowerPlan
    """
    import time

    from scipy import stats as sst

    t0 = time.perf_counter()
    if test not in ("t2circ", "itpc", "evoked"):
        raise AnalysisError(f"test must be t2circ, itpc or evoked, got {test!r}")
    if not 0 < alpha < 1 or not 0 < power < 1:
        raise AnalysisError(f"alpha and power must lie between 0 and 1, got {alpha}, {power}")
    if n_sim < 10:
        raise AnalysisError(f"n_sim must be >= 10, got {n_sim}")
    names = [r.name for r in rates.rows[1:]]
    level = level or names[-1]
    if level not in names:
        raise AnalysisError(f"level {level!r} is not a level above the unit; have {names}")
    row = rates.row(level)
    rate = row.rate * harmonic
    if not (harmonic >= 1 and rate < rates.unit.rate):
        raise AnalysisError(f"harmonic {harmonic} of {level} ({rate:g} Hz) is not below the "
                            f"unit rate ({rates.unit.rate:g} Hz)")
    window = float(rates.window)
    T_grid = _check_grid(trials, "trials", 3)
    P_grid = _check_grid(participants, "participants", 2)
    m = int(n_tests) if n_tests is not None else max(1, len(rates.target_bins()))
    if m < 1:
        raise AnalysisError(f"n_tests must be >= 1, got {n_tests}")
    g, effect = _gamma(snr=snr, snr_db=snr_db, itpc=itpc, amplitude=amplitude,
                       noise_sd=noise_sd, sfreq=sfreq, window=window, pilot_window=pilot_window)
    seed = None
    if rng is None or isinstance(rng, (int, np.integer)):
        seed = int(np.random.SeedSequence().entropy % 2 ** 32) if rng is None else int(rng)
        rng = np.random.default_rng(seed)
    a = alpha / m
    Tmax, Pmax = T_grid[-1], P_grid[-1]
    chunk = max(1, int(2_000_000 // (Pmax * Tmax)))
    hits_g = np.zeros((len(T_grid), len(P_grid)))
    hits_p = np.zeros(len(T_grid))
    done = 0
    amp = math.sqrt(g)
    while done < n_sim:
        b = min(chunk, n_sim - done)
        phi = rng.uniform(-np.pi, np.pi, size=(b, Pmax, 1))
        noise = (rng.standard_normal((b, Pmax, Tmax)) + 1j * rng.standard_normal((b, Pmax, Tmax)))
        Z = amp * np.exp(1j * phi) + noise / math.sqrt(2.0)
        for i, T in enumerate(T_grid):
            z = Z[..., :T]
            ray = stats.rayleigh(z, axis=-1)
            r = np.asarray(ray.r)
            if test == "t2circ":
                pp = np.asarray(stats.t2circ(z, axis=-1).p)
            elif test == "itpc":
                pp = np.asarray(ray.p)
            else:  # the evoked test analyze runs: the mean at bin 0, 2 n_side noise bins beside
                nb = 2 * n_side
                en = (rng.standard_normal((b, Pmax, nb)) + 1j * rng.standard_normal(
                    (b, Pmax, nb))) / math.sqrt(2.0 * T)
                spec = np.concatenate([z.mean(axis=-1)[..., None], en], axis=-1)
                pp = np.asarray(stats.evoked_test(spec, k=0, neighbours=np.arange(1, nb + 1)).p)
            hits_p[i] += np.count_nonzero(pp <= a) / Pmax
            x = r - stats.itpc_null_mean(T)
            for j, P in enumerate(P_grid):
                pg = sst.ttest_1samp(x[:, :P], 0.0, axis=1, alternative="greater").pvalue
                hits_g[i, j] += np.count_nonzero(pg <= a)
        done += b
    pw_g = hits_g / n_sim
    pw_p = hits_p / n_sim
    rows = []
    for i, T in enumerate(T_grid):
        for j, P in enumerate(P_grid):
            rows.append({"n_trials": T, "n_participants": P, "power_group": float(pw_g[i, j]),
                         "se_group": float(math.sqrt(pw_g[i, j] * (1 - pw_g[i, j]) / n_sim)),
                         "power_participant": float(pw_p[i]),
                         "se_participant": float(math.sqrt(pw_p[i] * (1 - pw_p[i])
                                                           / (n_sim * Pmax)))})
    single = next((T for i, T in enumerate(T_grid) if pw_p[i] >= power), None)
    by_T = {T: next((P for j, P in enumerate(P_grid) if pw_g[i, j] >= power), None)
            for i, T in enumerate(T_grid)}
    ok = [(T * P, T, P) for T, P in by_T.items() if P is not None]
    cheapest = None
    if ok:
        tot, T, P = min(ok)
        cheapest = {"n_trials": T, "n_participants": P, "total_trials": tot}
    return PowerPlan(
        rows=rows, trials=T_grid, participants=P_grid,
        design={"level": level, "harmonic": harmonic, "rate_hz": rate, "window_s": window,
                "n_tests": m, "unit_rate_hz": rates.unit.rate},
        effect=effect,
        settings={"alpha": alpha, "power": power, "test": test, "n_sim": n_sim, "seed": seed,
                  "group_test": "one-sided t-test of ITPC minus its null expectation",
                  "participant_threshold": a},
        recommendation={"trials_per_participant": single, "participants_by_trials": by_T,
                        "cheapest": cheapest},
        seconds=time.perf_counter() - t0)
