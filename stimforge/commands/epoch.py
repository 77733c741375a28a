"""`stimforge epoch RECORDING --build DIR --list N`: cut the analysed windows from a recording.

Exit codes: 0 epochs written; 1 the recorded codes disagree with the list's plan (every
disagreement printed, nothing written); 2 bad input (unreadable recording, no build, ...).
"""

from __future__ import annotations

import argparse
from pathlib import Path


def add_parser(sub) -> None:
    p = sub.add_parser(
        "epoch",
        help="cut each trial's analysed window from a continuous EEG/MEG recording",
        description="Read a recording (FIF, BrainVision .vhdr, EDF/BDF, EEGLAB .set) with "
        "MNE-Python, find the trigger codes, check them against the plan of one list of a "
        "build, and write the analysed windows (lead-in dropped, audio delay applied) as "
        "-epo.fif and .npz.  Nothing is written when the codes disagree with the plan.",
        epilog="Measure the audio-to-trigger delay of your own set-up (sound card, amplifier) "
        "and pass it as --delay; trigger codes sent by the program are not the sound.",
        formatter_class=argparse.ArgumentDefaultsHelpFormatter,
    )
    p.add_argument("recording", type=Path, help="the continuous recording")
    p.add_argument("--build", type=Path, required=True, help="the stimforge build folder played")
    p.add_argument("--list", type=int, required=True, dest="list_number",
                   help="the list that was played (trials.tsv column 'list')")
    p.add_argument("--events-from", choices=["auto", "stim", "annotations"], default="auto",
                   help="where the codes are: a stim channel, or annotations/markers (EDF, "
                   "BrainVision, EEGLAB); auto = a stim channel when there is one")
    p.add_argument("--stim-channel", default=None, help="stim channel name, if several")
    p.add_argument("--delay", type=float, default=0.0, metavar="MS",
                   help="measured audio-to-trigger delay in ms (+ = sound after the code)")
    p.add_argument("--tolerance", type=float, default=0.25, metavar="S",
                   help="largest accepted difference between a recorded and a planned "
                   "onset-to-next-onset interval, seconds")
    p.add_argument("--ignore-code", type=int, action="append", default=[], metavar="N",
                   help="a code to leave out (e.g. response buttons); may repeat")
    p.add_argument("--participant", default=None, help="participant id written into the .npz")
    p.add_argument("--drop-mismatched", action="store_true",
                   help="instead of refusing, leave out the trials a disagreement touches")
    p.add_argument("--out", type=Path, default=None,
                   help="output FILE ending in -epo.fif (the .npz goes beside it) or .npz; "
                   "default: <recording>_list-N-epo.fif beside the recording")
    p.add_argument("--overwrite", action="store_true", help="replace existing output files")
    p.set_defaults(run=run)


def _default_out(recording: Path, n: int) -> Path:
    name = recording.name
    for suf in (".fif.gz", ".fif", ".vhdr", ".edf", ".bdf", ".set", ".gdf"):
        if name.lower().endswith(suf):
            name = name[: -len(suf)]
            break
    for suf in ("_raw", "-raw", "_eeg", "_meg"):
        name = name.removesuffix(suf)
    return recording.with_name(f"{name}_list-{n}-epo.fif")


def run(args) -> int:
    import sys

    from ..epochs import epoch_recording, output_paths
    from ..errors import EpochError, EpochMismatch

    out = args.out or _default_out(args.recording, args.list_number)
    fif, npz = output_paths(out)
    if not args.overwrite:
        for p in (fif, npz):
            if p.exists():
                raise EpochError(f"{p} exists; choose another --out or pass --overwrite")
    try:
        res = epoch_recording(
            args.recording, build=args.build, list_number=args.list_number,
            events_from=args.events_from, stim_channel=args.stim_channel, delay_ms=args.delay,
            tolerance=args.tolerance, ignore_codes=args.ignore_code,
            participant=args.participant, drop_mismatched=args.drop_mismatched)
    except EpochMismatch as exc:
        print(f"refused: {exc}", file=sys.stderr)
        return 1
    fif, npz = res.save(out, overwrite=args.overwrite)
    md = res.metadata
    print(f"{args.recording}: {len(res.recorded.values)} codes from {res.recorded.source}; "
          f"{res.match.format()}")
    for note in res.match.notes:
        print(f"note: {note}")
    if res.dropped:
        print(f"left out (--drop-mismatched): list positions {', '.join(map(str, res.dropped))}")
    print(res.window.describe())
    counts = md.groupby(["condition", "repetition"]).size()
    print("epochs per condition and hearing: "
          + ", ".join(f"{c} h{r}: {n}" for (c, r), n in counts.items()))
    print(f"wrote {fif} and {npz} ({len(md)} epochs x {len(res.epochs.ch_names)} channels x "
          f"{len(res.epochs.times)} samples)")
    if not args.delay:
        print("caution: no --delay given: the windows start at the trigger codes. Sound reaches "
              "the ear later (sound-card buffers, tubing): measure that delay on your own "
              "hardware and pass it as --delay MS, or every phase is off by it.")
    print("Recordings are of people: analyse them only under your ethics approval; local rules "
          "and your lab's licensed practice decide.")
    return 0
