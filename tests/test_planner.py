"""The trial-count planner: its power against closed forms and a direct Monte Carlo.

"calc" = worked out from the formula beside it.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from matplotlib.figure import Figure
from scipy import stats as sst

from stimforge import response as R
from stimforge import stats
from stimforge.errors import AnalysisError
from stimforge.grid import grid_from_numbers
from stimforge.planner import gamma_from_itpc, itpc_from_gamma, plan_power


def _rates(n_top=4, levels=(("word", 2), ("line", 2))):
    return grid_from_numbers(unit_duration=0.25, levels=list(levels), sr=16000,
                             n_top_groups=n_top)


def test_one_participants_power_matches_the_noncentral_f_of_t2circ():
    # Victor & Mast (1991): M T2circ ~ F(2, 2M-2); with a phasor of power gamma (noise power 1)
    # the statistic is noncentral with lambda = 2 M gamma (calc: |zbar|^2 / (1/2M) is a
    # noncentral chi2_2 with that lambda)
    gamma, alpha, m = 0.15, 0.05, 3
    pl = plan_power(_rates(), snr=1 + gamma, trials=[10, 30, 60], participants=[2, 4],
                    alpha=alpha, n_tests=m, n_sim=4000, rng=1)
    for T in (10, 30, 60):
        crit = sst.f.isf(alpha / m, 2, 2 * T - 2)
        exact = sst.ncf.sf(crit, 2, 2 * T - 2, 2 * T * gamma)
        row = [r for r in pl.rows if r["n_trials"] == T][0]
        # 4000 studies x 4 participants: SE <= 0.004; allow 4 SE
        assert row["power_participant"] == pytest.approx(exact, abs=4 * max(row["se_participant"],
                                                                            0.002))


def test_group_power_matches_a_direct_time_domain_monte_carlo(rng):
    """Sinusoids in white noise, through the analysis' own spectra, ITPC and t-test."""
    T, P, S, fs, n = 16, 8, 400, 100.0, 200  # 2 s trials at 100 Hz (two lines)
    A, sd = 0.05, 1.0
    # gamma = A^2 n / (4 sd^2) = 0.125 over the 2 s window [calc]
    lines = _rates(n_top=2, levels=[("line", 4)])  # 1 Hz lines, 4 Hz units
    pl = plan_power(lines, amplitude=A, noise_sd=sd, sfreq=fs, trials=[T],
                    participants=[P], alpha=0.05, n_tests=1, n_sim=3000, rng=2)
    assert pl.effect["gamma"] == pytest.approx(A * A * n / (4 * sd * sd))
    t = np.arange(n) / fs
    phase = rng.uniform(-np.pi, np.pi, size=(S * P, 1))
    data = sd * rng.standard_normal((T, S * P, n)) + A * np.cos(2 * np.pi * 1.0 * t + phase)
    grid = R.analysis_grid(lines, sfreq=fs, n_times=n)
    Z = R.epoch_spectra(data, sfreq=fs, window=grid.window, n_bins=grid.n_bins)
    k = [tg.bin for tg in grid.targets if tg.level == "line" and tg.harmonic == 1][0]
    r = np.asarray(stats.rayleigh(Z[..., k], axis=0).r).reshape(S, P)
    p = sst.ttest_1samp(r - stats.itpc_null_mean(T), 0.0, axis=1, alternative="greater").pvalue
    direct = float(np.mean(p <= 0.05))
    planned = pl.rows[0]["power_group"]
    se = math.sqrt(direct * (1 - direct) / S + pl.rows[0]["se_group"] ** 2)
    assert 0.2 < planned < 0.95  # a case where power is informative
    assert planned == pytest.approx(direct, abs=4 * se)


def test_expected_itpc_of_a_phasor_in_noise(rng):
    for g in (0.05, 0.5, 3.0):
        z = math.sqrt(g) + (rng.standard_normal(200000) + 1j * rng.standard_normal(200000)) \
            / math.sqrt(2)
        mc = float(np.mean(np.cos(np.angle(z))))
        assert itpc_from_gamma(g) == pytest.approx(mc, abs=0.005)  # MC SE ~ 0.0016
        assert gamma_from_itpc(itpc_from_gamma(g)) == pytest.approx(g, rel=1e-8)
    # small gamma: sqrt(pi gamma) / 2 (calc, I0(0) = 1, I1(0) = 0)
    assert itpc_from_gamma(1e-6) == pytest.approx(math.sqrt(math.pi * 1e-6) / 2, rel=1e-5)


def test_the_trial_length_enters_the_response_size():
    kw = dict(amplitude=0.5, noise_sd=5.0, sfreq=250.0, trials=[10], participants=[4],
              n_sim=20, rng=3)
    g4 = plan_power(_rates(4), **kw).effect["gamma"]
    g8 = plan_power(_rates(8), **kw).effect["gamma"]
    # 0.5 uV in 5 uV noise over 4 s at 250 Hz: 0.25 * 1000 / (4 * 25) = 2.5; twice as long
    # trials give twice the single-trial power SNR minus 1 [calc]
    assert g4 == pytest.approx(2.5) and g8 == pytest.approx(5.0)
    # a pilot SNR measured over 4 s and planned for 8 s trials scales the same way [calc]
    pilot = plan_power(_rates(8), snr=1.2, pilot_window=4.0, trials=[10], participants=[4],
                       n_sim=20, rng=3)
    assert pilot.effect["gamma"] == pytest.approx(0.4)
    assert plan_power(_rates(8), snr_db=10 * math.log10(1.2), trials=[10], participants=[4],
                      n_sim=20, rng=3).effect["gamma"] == pytest.approx(0.2)


def test_plan_result_table_recommendation_and_figure():
    pl = plan_power(_rates(8), snr=1.15, trials=[10, 40, 80], participants=[4, 12, 24],
                    n_sim=300, rng=4)
    tab = pl.table
    assert list(tab.index) == [10, 40, 80] and list(tab.columns)[:3] == [4, 12, 24]
    ch = pl.recommendation["cheapest"]
    assert ch is not None
    assert pl._cell(ch["n_trials"], ch["n_participants"], "power_group") >= 0.8
    single = pl.recommendation["trials_per_participant"]
    if single is not None:
        assert pl._cell(single, 4, "power_participant") >= 0.8
    # power never falls as participants are added (same simulated people, nested), calc
    for T in (10, 40, 80):
        ys = [pl._cell(T, P, "power_group") for P in (4, 12, 24)]
        assert ys == sorted(ys)
    assert isinstance(pl.plot(), Figure)
    assert "PowerPlan" in repr(pl) and "<table" in pl._repr_html_()
    assert json.loads(json.dumps(pl.to_dict()))["schema_version"] == 1


@pytest.mark.parametrize("kwargs, match", [
    (dict(), "one way"),
    (dict(snr=1.2, itpc=0.3), "one way"),
    (dict(snr=0.9), "must be > 1"),
    (dict(itpc=1.2), "between 0 and 1"),
    (dict(amplitude=1.0), "needs --noise"),
    (dict(snr=1.2, level="stanza"), "not a level above the unit"),
    (dict(snr=1.2, harmonic=5), "not below the unit rate"),
    (dict(snr=1.2, trials=[1]), "trials"),
])
def test_plan_errors_name_the_option(kwargs, match):
    with pytest.raises(AnalysisError, match=match):
        plan_power(_rates(), n_sim=20, **kwargs)


def test_plan_command(tmp_path, capsys):
    from stimforge import cli

    out, fig = tmp_path / "plan.json", tmp_path / "curves.png"
    rc = cli.main(["plan", "--unit-duration", "0.25", "--level", "word=2", "--level", "line=2",
                   "--window", "8", "--itpc", "0.3", "--trials", "20,40", "--participants",
                   "8,16", "--sims", "200", "--seed", "5", "--json", str(out), "--figure",
                   str(fig)])
    assert rc == 0
    text = capsys.readouterr().out
    assert "group power" in text and "line 1 Hz" in text
    doc = json.loads(out.read_text())
    assert doc["design"]["window_s"] == 8.0 and doc["settings"]["seed"] == 5
    assert fig.read_bytes()[:4] == b"\x89PNG"
    assert cli.main(["plan", "--unit-duration", "0.25", "--level", "line=4", "--window", "7.5",
                     "--snr", "1.2"]) == 2
    assert "whole number of cycles" in capsys.readouterr().err
    assert cli.main(["plan", "--unit-duration", "0.25", "--level", "line=4", "--window", "8",
                     "--snr", "1.2", "--json", str(out)]) == 2  # never writes over a file
