"""Benchmark of the response analysis and the planner.

Prints, measured in one run on this machine:
* seconds per participant for ``analyze`` on 64 channels x 100 trials x 10 s at 500 Hz
  (50 items heard twice, 2 conditions; bootstrap and permutations of the phase comparison at
  their defaults), with the share of the spectra (FFT) step;
* the group stage over ``--participants`` (default 30) participants;
* peak memory: the process high-water mark (ru_maxrss) and tracemalloc's peak during one
  participant's analysis beside the size of that participant's data (256 MB in float64);
* reading one participant's ``.npz`` from disk;
* the planner's run time for the default 10 x 10 grid (1000 simulated studies per cell).

The data are white noise with a weak 1 Hz response in 8 channels; the design is 0.25 s
syllables, words of 2, lines of 2 (4 / 2 / 1 Hz), 10 lines per trial.

Run:  python tests/bench/bench_response.py [--participants 30] [--no-io]
"""

from __future__ import annotations

import argparse
import resource
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np

from stimforge import response as R
from stimforge.grid import grid_from_numbers
from stimforge.planner import plan_power

N_CH, N_TR, SECONDS, SFREQ = 64, 100, 10.0, 500.0


def participant(rng: np.random.Generator, k: int) -> R.EpochSet:
    n = int(SECONDS * SFREQ)
    t = np.arange(n) / SFREQ
    data = rng.standard_normal((N_TR, N_CH, n)) * 5.0
    data[:, :8] += 0.1 * np.cos(2 * np.pi * 1.0 * t + rng.uniform(-np.pi, np.pi))
    items = np.tile(np.arange(N_TR // 4), 4)
    rep = np.tile(np.repeat([1, 2], N_TR // 4), 2)
    cond = np.repeat(["intact", "scrambled"], N_TR // 2)
    return R.epochs_from_array(data, sfreq=SFREQ, ch_names=[f"E{i}" for i in range(N_CH)],
                               condition=cond, repetition=rep, item=items.astype(str),
                               source=f"P{k:02d}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawTextHelpFormatter)
    ap.add_argument("--participants", type=int, default=30)
    ap.add_argument("--no-io", action="store_true", help="skip the .npz reading step")
    args = ap.parse_args()
    rates = grid_from_numbers(unit_duration=0.25, levels=[("word", 2), ("line", 2)], sr=16000,
                              n_top_groups=10, unit_name="syllable")
    rng = np.random.default_rng(1)
    times, fft_times, parts = [], [], []
    trace_peak = 0
    data_mb = N_TR * N_CH * SECONDS * SFREQ * 8 / 2 ** 20
    for k in range(args.participants):
        es = participant(rng, k)
        if k == 0:
            grid = R.analysis_grid(rates, sfreq=SFREQ, n_times=es.n_times)
            t0 = time.perf_counter()
            R.epoch_spectra(es.data, sfreq=SFREQ, window=grid.window, n_bins=grid.n_bins)
            fft_times.append(time.perf_counter() - t0)
            tracemalloc.start()
        t0 = time.perf_counter()
        parts.append(R.analyze_participant(es, rates=rates, participant=f"P{k:02d}", rng=k))
        times.append(time.perf_counter() - t0)
        if k == 0:
            trace_peak = tracemalloc.get_traced_memory()[1]
            tracemalloc.stop()
        del es
    t0 = time.perf_counter()
    notes: list[str] = []
    if len(parts) > 1:
        R._group(parts, alpha=0.05, correction="holm", rng=np.random.default_rng(2),
                 n_boot=2000, n_perm=2000, notes=notes)
    group_s = time.perf_counter() - t0
    maxrss_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    tt = np.array(times)
    print(f"response analysis, {N_CH} ch x {N_TR} trials x {SECONDS:g} s at {SFREQ:g} Hz "
          f"({data_mb:.0f} MB float64 per participant), {len(parts)} participant(s):")
    print(f"  seconds per participant: mean {tt.mean():.2f}, min {tt.min():.2f}, max "
          f"{tt.max():.2f} (first, incl. warm-up: {tt[0]:.2f})")
    print(f"  of which spectra (FFT of all epochs): {fft_times[0]:.2f} s "
          f"({100 * fft_times[0] / tt[0]:.0f} % of the first participant)")
    print(f"  group stage over {len(parts)} participants: {group_s:.2f} s")
    print(f"  findings per participant: {len(parts[0].finding_rows)}; total "
          f"{sum(len(p.finding_rows) for p in parts)}")
    print(f"  peak memory: process high-water mark {maxrss_mb:.0f} MB; tracemalloc peak during "
          f"one participant's analysis {trace_peak / 2 ** 20:.0f} MB (its data "
          f"{data_mb:.0f} MB, held by the caller)")
    if not args.no_io:
        with tempfile.TemporaryDirectory() as tmp:
            es = participant(rng, 99)
            path = Path(tmp) / "P99.npz"
            np.savez(path, data=es.data, sfreq=SFREQ, ch_names=np.array(es.ch_names),
                     condition=es.labels["condition"], repetition=es.labels["repetition"],
                     item=es.labels["item"])
            del es
            t0 = time.perf_counter()
            R.load_epochs(path)
            print(f"  reading one participant's .npz ({path.stat().st_size / 2 ** 20:.0f} MB): "
                  f"{time.perf_counter() - t0:.2f} s")
    pl = plan_power(rates, snr=1.1, rng=3)
    print(f"planner, {len(pl.trials)} x {len(pl.participants)} grid, "
          f"{pl.settings['n_sim']} studies per cell: {pl.seconds:.2f} s")


if __name__ == "__main__":
    main()
