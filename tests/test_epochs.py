"""Epochs from continuous recordings (stimforge/epochs.py, stimforge/simulate.py, `epoch`).

Real builds (synthetic tokens, cut/pad re-timing), sessions simulated from their plans with
MNE-Python at 1024 and 500 Hz (and, untuned, 256 / 2048 Hz and EEGLAB), written to FIF,
BrainVision and EDF, read back and cut.  The simulation's ``ONSET`` channel holds the time
since each trial's true analysis onset, so the value at an epoch's first sample is the
epoch's start error: that, not the cutting code's own arithmetic, shows windows exact to a
sample.  Responses found with the shared statistics (stimforge/stats.py).
"""

from __future__ import annotations

import json
import re
from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest

mne = pytest.importorskip("mne")

from small_sets import write_small_set
from stimforge.audio_io import read_tsv
from stimforge.epochs import (
    epoch_recording,
    find_codes,
    match_plan,
    output_paths,
    read_plan,
    read_recording,
)
from stimforge.errors import EpochError, StimforgeError
from stimforge.simulate import Response, simulate_session, write_recording
from stimforge.stats import dft_bins, evoked_test, neighbour_bins
from stimforge.timing import exact, round_half_up

ROOT = Path(__file__).resolve().parents[1]
PLANTED = ("Fz", "Cz", "Pz")
QUIET = ("Oz", "T7", "T8")


# --------------------------------------------------------------------------- builds
def make_build(folder: Path, *, unit: float = 0.25, events: dict | None = None) -> Path:
    """Build a 3-condition, 2-list set (8 presentations a list) and return its folder."""
    from stimforge.build import build

    p = write_small_set(folder, name="ep", seed=4, unit=unit,
                        events=events or {"iti": 1.0, "jitter": 0.3})
    return build(p, out=folder / "out", progress=False).out


@pytest.fixture(scope="module")
def built(tmp_path_factory) -> Path:
    return make_build(tmp_path_factory.mktemp("ep25"))


@pytest.fixture(scope="module")
def built32(tmp_path_factory) -> Path:
    # 0.32 s units: the 3.84 s window is 3932.16 samples at 1024 Hz (calc)
    return make_build(tmp_path_factory.mktemp("ep32"), unit=0.32)


def responses(plan, amp=0.5e-6):
    """Every level's rate in the intact trials on the planted channels (phases arbitrary)."""
    return [Response(rate=r.rate, amplitude=amp, channels=PLANTED, conditions=("intact",),
                     phase=0.4 + i) for i, r in enumerate(plan.rates.rows)]


def evoked_p(epochs, plan, *, condition="intact") -> dict[tuple[str, float], float]:
    """p of the evoked test at every level's bin, per EEG channel (stimforge.stats)."""
    rates = plan.rates
    sel = epochs[epochs.metadata["condition"] == condition]
    names = [c for c in sel.ch_names if c in PLANTED + QUIET]
    x = sel.get_data(picks=names)
    n_bins = rates.n_bins_needed()
    spec = dft_bins(x, sr=sel.info["sfreq"], window=float(plan.window), n_bins=n_bins).mean(0)
    out = {}
    for r in rates.rows:
        nb = neighbour_bins(r.bin, n_total=n_bins, exclude=rates.structure_bins(n_bins))
        res = evoked_test(spec, k=r.bin, neighbours=nb)
        for c, p in zip(names, np.atleast_1d(res.p)):
            out[(c, r.rate)] = float(p)
    return out


def start_errors(res) -> np.ndarray:
    """Epoch start minus the true analysis onset, in samples (from the ONSET channel)."""
    return res.epochs.get_data(picks=["ONSET"])[:, 0, 0] * res.epochs.info["sfreq"]


# --------------------------------------------------------------------------- three formats
@pytest.mark.parametrize("sfreq", [1024.0, 500.0])
@pytest.mark.parametrize("suffix", ["_raw.fif", ".vhdr", ".edf"])
def test_simulated_session_round_trip(built, tmp_path, rng, sfreq, suffix):
    plan = read_plan(built, list_number=1)
    ses = simulate_session(built, list_number=1, sfreq=sfreq, rng=rng, noise=3e-6,
                           responses=responses(plan), audio_delay=0.02, timing_channel=True)
    path = write_recording(ses.raw, tmp_path / f"sub{suffix}")
    res = epoch_recording(path, build=built, list_number=1, delay_ms=20,
                          picks=["eeg", "misc"])
    assert res.recorded.source == ("stim channel STI" if suffix == "_raw.fif" else "annotations")
    assert res.match.ok and res.match.method == "timing"
    # calc: 3 s window -> 3072 samples at 1024 Hz, 1500 at 500 Hz
    assert len(res.epochs.times) == round(3 * sfreq) and res.window.whole
    # starts exact to one sample: the true analysis onset lies within half a sample of every
    # epoch's first sample (ONSET channel; EDF's 16-bit scaling adds < 0.05 sample, calc)
    assert np.max(np.abs(start_errors(res))) <= 0.5 + 0.05
    # and each start is round_half_up(trigger + (analysis_onset + delay) * sfreq), with the
    # simulation's own trigger samples
    md = res.metadata
    fs = exact(sfreq)
    for _, row in md.iterrows():
        t = next(t for t in plan.trials if t.order == row["order"])
        want = round_half_up(ses.trigger_samples[t.order] + (t.analysis_onset
                                                              + Fraction(20, 1000)) * fs)
        assert row["start_sample"] == want
    # metadata = the build's trials.tsv rows of list 1, in playing order
    trials = sorted((r for r in read_tsv(built / "trials.tsv") if r["list"] == "1"),
                    key=lambda r: int(r["order"]))
    assert len(md) == len(trials) == 8
    for (_, m), r in zip(md.iterrows(), trials):
        assert (m["condition"], m["repetition"], m["item"], m["stim_file"], m["order"],
                m["value"]) == (r["condition"], int(r["repetition"]), int(r["trial"]),
                                r["stim_file"], int(r["order"]), int(r["value"]))
    # planted rates found where planted, not elsewhere
    p = evoked_p(res.epochs, plan)
    for r in plan.rates.rows:
        # spec bounds (calc): the planted responses (default_responses) give p far below
        # 1e-4 over these trials; a quiet channel's p is uniform, below 1e-3 in 0.1 % of tests
        assert all(p[(c, r.rate)] < 1e-4 for c in PLANTED), (r.rate, p)
        assert all(p[(c, r.rate)] > 1e-3 for c in QUIET), (r.rate, p)


# MNE-Python 1.13 reads -epo.fif metadata with DataFrame.set_index(inplace=True), which
# pandas 3.1 deprecates (measured); not stimforge's call
@pytest.mark.filterwarnings("ignore:The inplace keyword in DataFrame.set_index")
def test_epoch_files_round_trip(built, tmp_path, rng):
    ses = simulate_session(built, list_number=2, sfreq=500.0, rng=rng)
    res = epoch_recording(ses.raw, build=built, list_number=2, participant="P07")
    fif, npz = res.save(tmp_path / "p07-epo.fif")
    assert (fif.name, npz.name) == ("p07-epo.fif", "p07-epo.npz")
    back = mne.read_epochs(fif, verbose="error")
    assert back.metadata[["condition", "repetition", "item", "stim_file", "order", "value"]] \
        .equals(res.metadata[["condition", "repetition", "item", "stim_file", "order", "value"]])
    np.testing.assert_allclose(back.get_data(), res.epochs.get_data(), rtol=1e-6, atol=1e-12)
    z = np.load(npz)  # no pickles needed
    # calc: 8 presentations a list x 6 channels x 3 s at 500 Hz; the window is 3 lines x
    # 4 syllables x 0.25 s (tests/small_sets.py)
    assert z["data"].shape == (8, 6, 1500) and float(z["sfreq"]) == 500.0
    assert float(z["window"]) == 3.0 and str(z["participant"]) == "P07"
    assert z["ch_names"].tolist() == ["Fz", "Cz", "Pz", "Oz", "T7", "T8"]
    assert z["condition"].tolist() == res.metadata["condition"].tolist()
    assert z["repetition"].dtype.kind == "i" and z["stim_file"].dtype.kind == "U"
    assert set(z.files) >= {"data", "sfreq", "condition", "ch_names", "stim_file", "repetition",
                            "item", "start_offset", "order", "value"}
    with pytest.raises(EpochError, match="exists"):
        res.save(tmp_path / "p07-epo.fif")
    assert output_paths(tmp_path / "x.npz") == (tmp_path / "x-epo.fif", tmp_path / "x.npz")
    with pytest.raises(EpochError, match="-epo.fif"):
        output_paths(tmp_path / "x.fif")


# --------------------------------------------------------------------------- refusals
def test_missing_and_extra_trigger_refused_with_both_named(built, rng):
    ses = simulate_session(built, list_number=1, sfreq=500.0, rng=rng, missing=[3],
                           extra=[(30.5, 21)])
    with pytest.raises(EpochError) as info:
        epoch_recording(ses.raw, build=built, list_number=1)
    msg = str(info.value)
    t3 = next(t for t in read_plan(built, list_number=1).trials if t.order == 3)
    assert f"missing: no code for trial 3 of the list ({t3.condition}" in msg
    assert "extra: code 21 at 30.500 s" in msg
    assert "1 extra, 1 missing" in msg and "Nothing was cut" in msg
    res = epoch_recording(ses.raw, build=built, list_number=1, drop_mismatched=True)
    assert res.dropped == (3,) and 3 not in res.metadata["order"].tolist()
    assert len(res.epochs) == 7


def test_a_window_past_the_end_of_the_recording_is_named_before_cutting(built, rng):
    # the recording stops one sample before the last trial's window ends (as cut_epochs would
    # cut it): match_plan names it, so nothing is cut, and one sample more is enough
    ses = simulate_session(built, list_number=1, sfreq=500.0, rng=rng, tail=0.0)
    plan = read_plan(built, list_number=1)
    last = max(plan.trials, key=lambda t: t.order)
    trig = ses.trigger_samples[last.order] - ses.raw.first_samp
    end = trig + round(float(last.analysis_onset) * 500) + round(float(plan.window) * 500)  # calc
    short = ses.raw.copy().crop(tmax=(end - 1 - 1) / 500.0)  # crop keeps tmax: end - 1 samples
    with pytest.raises(EpochError, match=f"outside the recording: the analysed window of trial "
                                         f"{last.order} of the list"):
        epoch_recording(short, build=built, list_number=1)
    enough = ses.raw.copy().crop(tmax=(end - 1) / 500.0)  # exactly end samples
    assert len(epoch_recording(enough, build=built, list_number=1).epochs) == len(plan.trials)


def test_swapped_wrong_and_late_codes_named(built, rng):
    plan = read_plan(built, list_number=2)
    ses = simulate_session(built, list_number=2, sfreq=500.0, rng=rng, late={5: 0.8})
    raw = ses.raw
    rec = find_codes(raw, source="stim")
    # exchange the codes of two trials whose codes differ, and change a third
    by_order = {t.order: t for t in plan.trials}
    a = next(t for t in plan.trials if t.value != by_order[1].value)
    stim = raw._data[raw.ch_names.index("STI")]
    for order, code in ((1, a.value), (a.order, by_order[1].value)):
        s = ses.trigger_samples[order]
        stim[s:s + 5] = code
    s = ses.trigger_samples[8]
    stim[s:s + 5] = 99
    rec = find_codes(raw, source="stim")
    m = match_plan(rec, plan)
    kinds = sorted(d.kind for d in m.problems)
    assert kinds == ["swapped", "too_long", "wrong_code"], m.format()
    text = m.format()
    assert "trial 1 of the list" in text and f"trial {a.order} of the list" in text
    # trial 4 ran 0.8 s long (planted), +-1 sample of 2 ms from rounding onsets (calc)
    assert re.search(r"longer than planned: trial 4 of the list .* \(\+0\.80\d s", text)
    assert "recorded as code 99" in text


def test_wrong_list_names_the_list_that_fits(built, rng):
    ses = simulate_session(built, list_number=1, sfreq=250.0, rng=rng)
    with pytest.raises(EpochError, match=r"List 1 of the build matches this recording better "
                                         r"\(0 disagreement"):
        epoch_recording(ses.raw, build=built, list_number=2)


# --------------------------------------------------------------------------- delay, rounding
def test_delay_shifts_every_window_by_its_samples(built, rng):
    plan = read_plan(built, list_number=1)
    sfreq = 1024.0
    d_ms = 37.5  # calc: 38.4 samples at 1024 Hz
    ses = simulate_session(built, list_number=1, sfreq=sfreq, rng=rng, audio_delay=d_ms / 1000,
                           timing_channel=True)
    r0 = epoch_recording(ses.raw, build=built, list_number=1, delay_ms=0,
                         picks=["eeg", "misc"])
    rd = epoch_recording(ses.raw, build=built, list_number=1, delay_ms=d_ms,
                         picks=["eeg", "misc"])
    fs = exact(sfreq)
    shift = rd.metadata["start_sample"].to_numpy() - r0.metadata["start_sample"].to_numpy()
    for t, got in zip(plan.trials, shift):
        base = ses.trigger_samples[t.order] + t.analysis_onset * fs
        assert got == round_half_up(base + exact(d_ms) / 1000 * fs) - round_half_up(base)
    assert set(shift.tolist()) <= {38, 39}  # 38.4 samples rounded either way (calc)
    # without the delay every window starts 38.4 samples early; with it, within half a sample
    assert np.allclose(start_errors(r0), -38.4, atol=0.5 + 1e-6)
    assert np.max(np.abs(start_errors(rd))) <= 0.5 + 1e-6
    # start_offset = exact start - taken start = -(start error)
    assert np.allclose(-rd.metadata["start_offset"], start_errors(rd), atol=1e-6)


def test_window_not_whole_samples_is_cut_exactly_and_said(built32, rng):
    plan = read_plan(built32, list_number=1)
    assert plan.window == Fraction(384, 100)
    ses = simulate_session(built32, list_number=1, sfreq=1024.0, rng=rng, noise=3e-6,
                           responses=responses(plan), timing_channel=True)
    res = epoch_recording(ses.raw, build=built32, list_number=1, picks=["eeg", "misc"])
    w = res.window
    # calc: 3.84 s x 1024 Hz = 3932.16 -> 3932 samples, 0.16 sample short
    assert w.n_times == 3932 and not w.whole and w.exact_samples == pytest.approx(3932.16)
    text = w.describe()
    assert "not a whole number" in text and "3932 samples" in text and "-0.160 sample" in text
    # analysis onset 0.1 + 4 x 0.32 = 1.38 s = 1413.12 samples after the trigger (calc):
    # every start rounds down by 0.12 sample, the metadata says so, the data agree
    assert np.allclose(res.metadata["start_offset"], 0.12, atol=1e-9)
    assert np.allclose(start_errors(res), -0.12, atol=1e-6)
    # the exact-frequency DFT (3932 != 3932.16 samples) still finds every planted rate
    p = evoked_p(res.epochs, plan)
    for r in plan.rates.rows:  # 3.125, 1.5625, 0.78125 Hz
        # spec bounds (calc): the planted responses (default_responses) give p far below
        # 1e-4 over these trials; a quiet channel's p is uniform, below 1e-3 in 0.1 % of tests
        assert all(p[(c, r.rate)] < 1e-4 for c in PLANTED), (r.rate, p)
        assert all(p[(c, r.rate)] > 1e-3 for c in QUIET), (r.rate, p)


@pytest.mark.parametrize("sfreq, suffix", [(2048.0, ".set"), (256.0, ".set"), (256.0, ".edf")])
def test_untuned_rates_and_eeglab(built, tmp_path, rng, sfreq, suffix):
    """Cases the code was not tuned on (first run passed as written): 256 / 2048 Hz, EEGLAB."""
    ses = simulate_session(built, list_number=2, sfreq=sfreq, rng=rng, audio_delay=0.0173,
                           timing_channel=True, first_samp=0)
    path = write_recording(ses.raw, tmp_path / f"u{suffix}")
    res = epoch_recording(path, build=built, list_number=2, delay_ms=17.3,
                          picks=["eeg", "misc"])
    assert len(res.epochs) == 8 and len(res.epochs.times) == round(3 * sfreq)
    assert np.max(np.abs(start_errors(res))) <= 0.5 + 0.05


def test_cropped_recording_first_samp(built, rng):
    """A recording whose first sample is not 0 (cropped FIF): codes and windows still agree."""
    ses = simulate_session(built, list_number=1, sfreq=500.0, rng=rng, first_samp=777,
                           timing_channel=True)
    a = find_codes(ses.raw, source="stim")
    b = find_codes(ses.raw, source="annotations")
    assert np.array_equal(a.samples, b.samples) and np.array_equal(a.values, b.values)
    assert a.samples[0] >= 777
    res = epoch_recording(ses.raw, build=built, list_number=1, picks=["eeg", "misc"])
    assert np.max(np.abs(start_errors(res))) <= 0.5 + 1e-6


# --------------------------------------------------------------------------- inputs
def test_bad_inputs_are_named(built, tmp_path, rng):
    with pytest.raises(EpochError, match="recording not found"):
        read_recording(tmp_path / "none.vhdr")
    with pytest.raises(EpochError, match="not a recording format"):
        read_recording(tmp_path / "x.wav")
    (tmp_path / "junk.edf").write_bytes(b"not an edf")
    with pytest.raises(EpochError, match="MNE-Python cannot read it"):
        read_recording(tmp_path / "junk.edf")
    ses = simulate_session(built, list_number=1, sfreq=250.0, rng=rng)
    edf = write_recording(ses.raw, tmp_path / "s.edf")
    with pytest.raises(EpochError, match="no stim channel; use --events-from annotations"):
        epoch_recording(edf, build=built, list_number=1, events_from="stim")
    no_ann = ses.raw.copy().set_annotations(None).drop_channels(["STI"])
    with pytest.raises(EpochError, match="no trigger codes in the recording's annotations"):
        epoch_recording(no_ann, build=built, list_number=1)
    with pytest.raises(EpochError, match="--list 5: .* has lists 1, 2"):
        epoch_recording(ses.raw, build=built, list_number=5)
    with pytest.raises(EpochError, match="--build"):
        epoch_recording(ses.raw, build=tmp_path, list_number=1)
    with pytest.raises(EpochError, match="--stim-channel 'STl'.*did you mean 'STI'"):
        find_codes(ses.raw, stim_channel="STl")
    with pytest.raises(EpochError, match="--tolerance"):
        epoch_recording(ses.raw, build=built, list_number=1, tolerance=0)
    # annotations that are not codes are skipped and counted (EDF's BAD_ACQ_SKIP, comments)
    raw = ses.raw.copy()
    raw.set_annotations(raw.annotations + mne.Annotations([1.0, 2.0], [0.5, 0],
                                                          ["BAD_ACQ_SKIP", "Comment/hello"]))
    rec = find_codes(raw, source="annotations")
    # calc: 8 trial codes + list start + list end; the two non-code annotations set aside
    assert rec.ignored == {"BAD_ACQ_SKIP": 1, "Comment/hello": 1} and len(rec.values) == 10
    assert isinstance(EpochError("x"), (StimforgeError, ValueError))


# --------------------------------------------------------------------------- the CLI
def _cli(argv: list[str]) -> int:
    """`stimforge ...` as a user runs it."""
    from stimforge import cli

    return cli.main(argv)


def test_cli_simulate_epoch_and_refusal(built, tmp_path, capsys):
    rec = tmp_path / "s01.vhdr"
    assert _cli(["simulate", "--build", str(built), "--list", "2", "--sfreq", "500",
                 "--out", str(rec), "--delay", "12", "--seed", "3"]) == 0
    assert _cli(["epoch", str(rec), "--build", str(built), "--list", "2", "--delay", "12",
                 "--participant", "s01"]) == 0
    out = capsys.readouterr().out
    assert "8 trial codes matched by timing" in out and "audio delay 12 ms applied" in out
    assert (tmp_path / "s01_list-2-epo.fif").is_file()
    assert (tmp_path / "s01_list-2-epo.npz").is_file()
    # a second run does not write over the first
    assert _cli(["epoch", str(rec), "--build", str(built), "--list", "2"]) == 2
    # the wrong list: exit 1, the disagreements on stderr, nothing written
    assert _cli(["epoch", str(rec), "--build", str(built), "--list", "1", "--out",
                 str(tmp_path / "w-epo.fif")]) == 1
    err = capsys.readouterr().err
    assert "refused:" in err and "missing: no code for trial" in err
    assert not (tmp_path / "w-epo.fif").exists() and not (tmp_path / "w-epo.npz").exists()


# --------------------------------------------------------------------------- the demo
@pytest.mark.slow
def test_demo_build_to_epochs_in_three_formats(tmp_path, capsys):
    """The README path: demo build -> simulated session -> epoch (-> analyze when present)."""
    from stimforge.build import build

    out = build(ROOT / "recipes" / "demo.yaml", out=tmp_path / "demo", progress=False,
                check=False).out
    assert json.loads((out / "manifest.json").read_text())["events"]["scheme"] == "condition"
    plan = read_plan(out, list_number=1)
    assert len(plan.trials) == 40  # calc: the demo's 32 trials + 8 intact repeats per list
    for suffix in ("_raw.fif", ".vhdr", ".edf"):
        rec = tmp_path / f"sub-01{suffix}"
        assert _cli(["simulate", "--build", str(out), "--list", "1", "--sfreq", "500",
                     "--out", str(rec), "--delay", "20", "--jitter", "1"]) == 0
        epo = tmp_path / f"sub-01{suffix.split('.')[0]}{suffix.replace('.', '_')}-epo.fif"
        assert _cli(["epoch", str(rec), "--build", str(out), "--list", "1", "--delay", "20",
                     "--out", str(epo)]) == 0
        z = np.load(epo.with_name(epo.name.replace("-epo.fif", "-epo.npz")))
        assert z["data"].shape == (40, 6, 5000)  # calc: 10 s at 500 Hz
        assert sorted(set(z["condition"].tolist())) == ["intact", "reversed",
                                                        "syllables-scrambled",
                                                        "words-scrambled"]
        res = epoch_recording(rec, build=out, list_number=1, delay_ms=20)
        p = evoked_p(res.epochs, plan)
        for r in plan.rates.rows:  # every level's rate in the intact trials, planted channels
            assert all(p[(c, r.rate)] < 1e-3 for c in PLANTED), (suffix, r.rate, p)
        # the analysis stage on the .npz: the planted structure rates found where planted
        from stimforge.response import analyze

        found = analyze(epo.with_name(epo.name.replace("-epo.fif", "-epo.npz")), build=out,
                        rng=1).to_dict()["findings"]
        sig = {(f["condition"], f["channel"], round(f["rate_hz"], 6)) for f in found
               if f["significant"]}
        for r in plan.rates.rows[1:]:  # default_responses: levels in intact only
            assert {("intact", c, round(r.rate, 6)) for c in PLANTED} <= sig, (suffix, sig)
            assert not {(k, c, round(r.rate, 6)) for k in ("words-scrambled",
                                                           "syllables-scrambled", "reversed")
                        for c in PLANTED + QUIET} & sig, (suffix, sig)
        assert not {x for x in sig if x[1] in QUIET}, (suffix, sig)
    capsys.readouterr()
