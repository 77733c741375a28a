"""Event codes, planned presentations, playlists and marker channels (stimforge/events.py),
and what a build writes of them (the `value` column, events/, stimuli-marker/, the manifest)."""

from __future__ import annotations

import csv
import json
from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
import yaml

from small_sets import write_small_set
from stimforge.audio_io import read_tsv
from stimforge.errors import RecipeError
from stimforge.events import (
    EVENT_COLUMNS,
    EventSettings,
    assign_values,
    code_table,
    jitter_rng,
    marker_channel,
    plan_list,
    playlist_rows,
)
from stimforge.recipe import load_recipe, recipe_from_dict
from stimforge.timing import seconds_to_samples, unit_start

ROOT = Path(__file__).resolve().parents[1]


def rows(spec: dict[str, tuple[int, int]], *, lists: int = 1, duration: float = 4.2):
    """trials.tsv-like rows: condition -> (trials, hearings); orders in the given sequence."""
    out = []
    for li in range(1, lists + 1):
        order = 0
        for cond, (n_trials, n_hear) in spec.items():
            for t in range(1, n_trials + 1):
                for h in range(1, n_hear + 1):
                    order += 1
                    out.append({"stim_file": f"stimuli/{cond}_{t:03d}.wav", "condition": cond,
                                "trial": t, "repetition": h, "list": li, "order": order,
                                "duration": duration})
    return out


# --------------------------------------------------------------------------- codes
def test_default_codes_are_ten_times_condition_plus_hearing():
    r = rows({"intact": (2, 2), "scrambled": (2, 1), "reversed": (1, 1)})
    t = code_table(r, conditions=["intact", "scrambled", "reversed"])
    # the documented default scheme (stimforge/events.py): 10 * condition number + hearing
    assert t.scheme == "condition"
    assert {(x["condition"], x["repetition"]): v for x, v in
            zip(r, [t.code_for(x) for x in r])} == {
        ("intact", 1): 11, ("intact", 2): 12, ("scrambled", 1): 21, ("reversed", 1): 31}
    assert t.reserved == {"list_start": 250, "list_end": 251, "catch": 252}
    assert "intact, hearing 2" in t.format() and "list_start" in t.format()
    d = t.to_dict()
    assert d["scheme"] == "condition" and {"value": 12, "condition": "intact",
                                           "repetition": 2} in d["codes"]
    vals = assign_values(r, t)
    assert [v["value"] for v in vals[:4]] == [11, 12, 11, 12] and "value" not in r[0]


def test_many_hearings_fall_back_to_numbered_codes():
    # 11 hearings do not fit 10 * c + h (calc): numbered 1, 2, ... in condition, hearing order
    r = rows({"a": (1, 11), "b": (1, 1)})
    t = code_table(r, conditions=["a", "b"])
    assert t.scheme == "condition (numbered)"
    assert [t.code_for(x) for x in r] == list(range(1, 13))


def test_trial_scheme_gives_every_presentation_its_own_code():
    r = rows({"a": (3, 2), "b": (2, 1)})
    t = code_table(r, conditions=["a", "b"], settings={"codes": "trial"})
    codes = [t.code_for(x) for x in r]
    assert codes == list(range(1, 9)) and len(set(codes)) == len(r)
    assert t.meaning(4) == "a trial 2, hearing 2"


def test_trial_scheme_refuses_more_presentations_than_free_codes():
    r = rows({"a": (130, 2)})  # 260 presentations > 255 - 3 reserved (calc)
    with pytest.raises(RecipeError, match="'trial' needs 260 distinct codes.*252 free"):
        code_table(r, conditions=["a"], settings={"codes": "trial"})


def test_explicit_table_one_code_per_hearing_or_one_for_all():
    r = rows({"intact": (1, 2), "reversed": (1, 1)})
    t = code_table(r, conditions=["intact", "reversed"],
                   settings={"table": {"intact": [101, 102], "reversed": 40}})
    assert [t.code_for(x) for x in r] == [101, 102, 40] and t.scheme == "table"
    t2 = code_table(r, conditions=["intact", "reversed"],
                    settings={"table": {"intact": 7, "reversed": 40}})
    assert [t2.code_for(x) for x in r] == [7, 7, 40]
    assert t2.meaning(7) == "intact, every hearing"


@pytest.mark.parametrize("settings, match", [
    ({"table": {"intact": [11, 12]}}, "condition 'reversed' has no code"),
    ({"table": {"intact": [11], "reversed": [11]}}, "code 11 is used by both"),
    ({"table": {"intact": [11, 250], "reversed": 3}}, "reserved list_start code"),
    ({"table": {"intact": [11, 300], "reversed": 3}}, "integer 1-255"),
    ({"table": {"intact": [0], "reversed": 3}}, "integer 1-255"),
    ({"table": {"intact": [1, 2, 3], "reversed": 4, "nope": 5}}, "'nope' is not a condition"),
    ({"list_start": 5, "list_end": 5}, "reserved codes must differ"),
    ({"catch_conditions": ["reversed"], "catch": None}, "catch is null"),
    ({"catch_conditions": ["reversd"]}, "'reversd' is not a condition"),
    ({"codes": "item"}, "expected 'condition' or 'trial'"),
    ({"iti": -1.0}, "seconds >= 0"),
])
def test_code_table_errors_name_the_field(settings, match):
    r = rows({"intact": (1, 2), "reversed": (1, 1)})
    with pytest.raises(RecipeError, match=match):
        code_table(r, conditions=["intact", "reversed"], settings=settings)


def test_catch_conditions_carry_the_catch_code():
    r = rows({"intact": (1, 1), "target": (2, 1)})
    t = code_table(r, conditions=["intact", "target"],
                   settings={"catch_conditions": ["target"]})
    assert [t.code_for(x) for x in r] == [11, 252, 252]
    assert t.meaning(252) == "catch (target)"


# --------------------------------------------------------------------------- plans
def test_plan_onsets_are_the_sum_of_pauses_and_durations():
    r = rows({"a": (3, 1)}, duration=4.2)
    t = code_table(r, conditions=["a"])
    ev = plan_list(r, list_number=1, table=t, settings={"iti": 1.5})
    assert [e["trial_type"] for e in ev] == ["list_start", "a", "a", "a", "list_end"]
    # calc: onset_k = k * 1.5 + (k - 1) * 4.2; the end code after the last file
    assert [e["onset"] for e in ev] == pytest.approx([0, 1.5, 7.2, 12.9, 17.1], abs=1e-12)
    assert all(set(e) == set(EVENT_COLUMNS) for e in ev)
    pl = playlist_rows(ev)
    assert pl == [{"order": k, "file": f"stimuli/a_{k:03d}.wav", "code": 11, "interval": 1.5}
                  for k in (1, 2, 3)]
    pl2 = playlist_rows(ev, files={"stimuli/a_002.wav": "stimuli-marker/a_002.wav"})
    assert pl2[1]["file"] == "stimuli-marker/a_002.wav"


def test_jitter_is_seeded_whole_milliseconds_within_its_range():
    r = rows({"a": (30, 1)}, lists=2)
    t = code_table(r, conditions=["a"])
    s = EventSettings(iti=1.0, jitter=0.5)
    one = plan_list(r, list_number=1, table=t, settings=s, rng=jitter_rng(7, 1))
    again = plan_list(r, list_number=1, table=t, settings=s, rng=jitter_rng(7, 1))
    two = plan_list(r, list_number=2, table=t, settings=s, rng=jitter_rng(7, 2))
    iv = np.array([e["interval"] for e in one if e["interval"] is not None])
    assert one == again
    assert [e["interval"] for e in two] != [e["interval"] for e in one]
    assert np.all((iv >= 1.0) & (iv <= 1.5))
    # whole milliseconds (the playlist says what the plan says, exactly)
    assert all(Fraction(repr(float(v))) * 1000 == round(v * 1000) for v in iv)
    assert iv.std() > 0.05  # U(0, 0.5) has SD 0.144 s (calc); 30 draws
    with pytest.raises(RecipeError, match="seeded generator"):
        plan_list(r, list_number=1, table=t, settings=s)


def test_plan_of_an_empty_list_is_refused():
    r = rows({"a": (1, 1)})
    with pytest.raises(RecipeError, match="list 3 has no presentations"):
        plan_list(r, list_number=3, table=code_table(r, conditions=["a"]))


def test_marker_channel_pulses():
    y = marker_channel(1000, sr=1000, onsets=[0, 300], pulse=0.005, amplitude=0.5)
    # calc: 5 ms at 1 kHz = 5 samples at each onset
    assert np.flatnonzero(y).tolist() == [0, 1, 2, 3, 4, 300, 301, 302, 303, 304]
    assert set(y[y > 0]) == {0.5}
    with pytest.raises(RecipeError, match="outside the 1000-sample file"):
        marker_channel(1000, sr=1000, onsets=[1000], pulse=0.005, amplitude=0.5)
    with pytest.raises(RecipeError, match="marker_amplitude"):
        marker_channel(1000, sr=1000, onsets=[0], pulse=0.005, amplitude=1.5)


# --------------------------------------------------------------------------- recipe section
def _demo_dict() -> dict:
    return yaml.safe_load((ROOT / "recipes" / "demo.yaml").read_text())


def test_recipe_events_section_defaults_and_errors():
    base = ROOT / "recipes"
    r = load_recipe(base / "demo.yaml")
    assert r.events.codes == "condition" and r.events.iti == 2.0 and r.events.jitter == 0.0
    assert r.events.list_start == 250 and r.events.marker_channel is False
    d = _demo_dict()
    d["events"] = {"iti": 1.0, "jiter": 0.2}
    with pytest.raises(RecipeError, match="unknown key 'jiter'; did you mean 'jitter'"):
        recipe_from_dict(d, base_dir=base)
    d["events"] = {"catch_conditions": ["intakt"]}
    with pytest.raises(RecipeError, match="events.catch_conditions.*'intakt' is not a "
                                          "condition; did you mean 'intact'"):
        recipe_from_dict(d, base_dir=base)
    d["events"] = {"list_start": 256}
    with pytest.raises(RecipeError, match="events.list_start"):
        recipe_from_dict(d, base_dir=base)
    d["events"] = {"table": {"intact": [11, 12], "reversed": 40}}
    with pytest.raises(RecipeError, match="events.*condition 'words-scrambled' has no code"):
        recipe_from_dict(d, base_dir=base)
    d["events"] = {"codes": "trial"}  # 32 trials + 8 repeats = 40 codes: fits (calc)
    assert recipe_from_dict(d, base_dir=base).events.codes == "trial"


# --------------------------------------------------------------------------- in a build
def small_recipe(folder: Path, **events) -> Path:
    """A 3-condition, 2-list set of synthetic tokens, cut/pad re-timing (fast)."""
    return write_small_set(folder, name="ev", seed=11, events=events)


@pytest.fixture(scope="module")
def marked_build(tmp_path_factory):
    from stimforge.build import build

    folder = tmp_path_factory.mktemp("events")
    recipe = small_recipe(folder, iti=1.25, jitter=0.4, marker_channel=True, marker_pulse=0.004)
    return build(recipe, out=folder / "out", progress=False)


def test_build_writes_codes_plans_and_playlists(marked_build):
    out = marked_build.out
    trials = read_tsv(out / "trials.tsv")
    assert list(trials[0])[:8] == ["stim_file", "condition", "kind", "trial", "repetition",
                                   "list", "order", "value"]
    man = json.loads((out / "manifest.json").read_text())
    table = {(c["condition"], c["repetition"]): c["value"] for c in man["events"]["codes"]}
    # the documented default scheme: 10 x condition number + hearing (events.code_table)
    assert table == {("intact", 1): 11, ("intact", 2): 12, ("scrambled", 1): 21,
                     ("reversed", 1): 31}
    assert all(int(r["value"]) == table[(r["condition"], int(r["repetition"]))] for r in trials)
    for n in (1, 2):
        ev = read_tsv(out / "events" / f"list-{n}_events.tsv")
        assert list(ev[0]) == EVENT_COLUMNS
        mine = [r for r in trials if r["list"] == str(n)]
        body = [e for e in ev if e["stim_file"] != "n/a"]
        assert [e["stim_file"] for e in body] == [r["stim_file"] for r in
                                                   sorted(mine, key=lambda r: int(r["order"]))]
        assert ev[0]["trial_type"] == "list_start" and ev[-1]["trial_type"] == "list_end"
        # onset_k+1 = onset_k + duration_k + interval_k+1 (calc), to the microsecond of the TSV
        for a, b in zip(body[:-1], body[1:]):
            assert float(b["onset"]) == pytest.approx(
                float(a["onset"]) + float(a["duration"]) + float(b["interval"]), abs=2e-6)
        # calc: iti 1.25 s + a uniform jitter of width 0.4 s (the recipe above)
        assert all(1.25 <= float(e["interval"]) <= 1.65 for e in body)
        with open(out / "events" / f"list-{n}_playlist.csv", newline="") as fh:
            pl = list(csv.DictReader(fh))
        assert list(pl[0]) == ["order", "file", "code", "interval"]
        assert [p["file"] for p in pl] == ["stimuli-marker/" + e["stim_file"].split("/")[1]
                                           for e in body]
        assert [p["code"] for p in pl] == [e["value"] for e in body]
        assert [float(p["interval"]) for p in pl] == [float(e["interval"]) for e in body]
    assert "events/list-1_events.tsv" in man["outputs"]
    assert "trigger codes" in (out / "summary.txt").read_text()


def test_marker_copies_hold_the_speech_and_two_pulses(marked_build):
    out = marked_build.out
    rates = marked_build.recipe.rates()
    trials = read_tsv(out / "trials.tsv")
    row = trials[0]
    x, sr = sf.read(out / row["stim_file"], dtype="float64")
    y, sr2 = sf.read(out / "stimuli-marker" / row["stim_file"].split("/")[1], dtype="float64")
    assert sr2 == sr and y.shape == (len(x), 2)
    assert np.array_equal(y[:, 0], x)  # the speech channel untouched (same PCM_16 samples)
    onset = seconds_to_samples(0.1, sr=sr) + unit_start(int(row["lead_in_units"]),
                                                        unit_duration=0.25, sr=sr)
    assert onset / sr == pytest.approx(float(row["analysis_onset"]), abs=1e-6)
    n = round(0.004 * sr)  # calc: 64 samples at 16 kHz
    on = np.flatnonzero(y[:, 1] > 0.25)
    assert on.tolist() == list(range(n)) + list(range(onset, onset + n))
    assert rates.window == 3.0  # calc: 3 lines x 4 syllables x 0.25 s


def test_recomputed_plan_equals_the_written_one(marked_build, tmp_path):
    """epochs.read_plan recomputes the plan of a build without events/ identically."""
    pytest.importorskip("mne")
    import shutil

    from stimforge.epochs import read_plan

    out = marked_build.out
    copy = tmp_path / "copy"
    shutil.copytree(out, copy)
    shutil.rmtree(copy / "events")
    for n in (1, 2):
        a, b = read_plan(out, list_number=n), read_plan(copy, list_number=n)
        assert a.source.startswith("events") and b.source.startswith("recomputed")
        assert [e["onset"] for e in a.events] == pytest.approx([e["onset"] for e in b.events],
                                                               abs=2e-6)
        assert [e["value"] for e in a.events] == [e["value"] for e in b.events]
        assert a.trials == b.trials
