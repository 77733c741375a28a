"""`stimforge simulate --build DIR --list N --sfreq HZ --out FILE`: a simulated recording.

For trying `epoch` and `analyze` before there is real data: the list's codes on a stim
channel and as annotations, phase-locked responses at the design's rates in some channels,
noise everywhere.  Not a model of the brain.
"""

from __future__ import annotations

import argparse
from pathlib import Path


def _response(text: str) -> tuple[float, float, str | None]:
    """RATE=MICROVOLTS[@CONDITION]"""
    try:
        spec, _, cond = text.partition("@")
        rate, uv = spec.split("=")
        return float(rate), float(uv), (cond or None)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"--response {text!r}: expected RATE=MICROVOLTS or RATE=MICROVOLTS@CONDITION, "
            "e.g. 1.0=0.5@intact") from None


def add_parser(sub) -> None:
    p = sub.add_parser(
        "simulate",
        help="simulate a continuous EEG recording of one list of a build (for trying epoch)",
        description="Write a simulated recording of one list of a build: the codes of the "
        "list's plan on a stim channel and as annotations, responses at chosen rates on the "
        "first half of the channels, Gaussian noise.  The format follows the name: _raw.fif, "
        ".vhdr (BrainVision), .edf, .set (EEGLAB).",
        formatter_class=argparse.ArgumentDefaultsHelpFormatter,
    )
    p.add_argument("--build", type=Path, required=True)
    p.add_argument("--list", type=int, default=1, dest="list_number")
    p.add_argument("--sfreq", type=float, required=True, help="sampling rate, Hz")
    p.add_argument("--out", type=Path, required=True,
                   help="file ending in _raw.fif, .vhdr, .edf or .set")
    p.add_argument("--seed", type=int, default=1)
    p.add_argument("--delay", type=float, default=0.0, metavar="MS",
                   help="sound onset after its code (what epoch --delay corrects)")
    p.add_argument("--jitter", type=float, default=0.0, metavar="MS",
                   help="SD of the random part of that delay")
    p.add_argument("--noise", type=float, default=5.0, metavar="UV", help="noise SD, microvolts")
    p.add_argument("--response", type=_response, action="append", default=[],
                   metavar="RATE=UV[@COND]",
                   help="a planted response (default: the unit rate at 1 uV in every condition "
                   "but reversed ones, each level's rate at 0.5 uV in intact ones)")
    p.add_argument("--overwrite", action="store_true")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..simulate import Response, simulate_session, write_recording

    channels = ("Fz", "Cz", "Pz", "Oz", "T7", "T8")
    responses = None
    if args.response:
        responses = [Response(rate=r, amplitude=uv * 1e-6, channels=channels[:3],
                              conditions=(c,) if c else ()) for r, uv, c in args.response]
    ses = simulate_session(args.build, list_number=args.list_number, sfreq=args.sfreq,
                           rng=args.seed, channels=channels, responses=responses,
                           noise=args.noise * 1e-6, audio_delay=args.delay / 1000,
                           trigger_jitter=args.jitter / 1000)
    path = write_recording(ses.raw, args.out, overwrite=args.overwrite)
    print(f"wrote {path}: {ses!r}")
    for r in ses.responses:
        print(f"  planted {r.rate:g} Hz, {r.amplitude * 1e6:g} uV on {', '.join(r.channels)}"
              f" in {', '.join(r.conditions) or 'every condition'}")
    return 0
