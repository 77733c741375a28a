"""`stimforge plan`: trials per participant and participants needed, by simulation.

    stimforge plan (RECIPE.yaml | --build DIR | --unit-duration S --level NAME=SIZE ... --window S)
                   (--snr S | --snr-db D | --itpc R | --amplitude A --noise SD --sfreq F)
                   [--rate-level NAME] [--trials 10,20,...] [--participants 4,8,...]
                   [--alpha A] [--power P] [--tests M] [--json PATH] [--figure PATH.png]

Exit 0: planned; 2: bad input.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from ._grid_options import add_grid_options


def _ints(text: str) -> list[int]:
    try:
        v = [int(x) for x in text.split(",") if x.strip()]
    except ValueError:
        v = []
    if not v:
        raise argparse.ArgumentTypeError(f"{text!r}: expected whole numbers, e.g. 20,40,80")
    return v


def add_parser(sub) -> None:
    p = sub.add_parser(
        "plan",
        help="simulate the trials and participants needed to detect a response",
        description="Power by simulation at the design's trial length: one participant's test "
        "and the group test, over a grid of trials x participants. Exit 0: planned; 2: bad "
        "input.",
    )
    p.add_argument("recipe", nargs="?", type=Path, help="a stimforge recipe (YAML)")
    p.add_argument("--build", type=Path, metavar="DIR", help="a build folder instead")
    add_grid_options(p, when="without a recipe or --build")
    p.add_argument("--window", type=float, metavar="S",
                   help="analysed seconds per trial (with --unit-duration)")
    p.add_argument("--rate-level", metavar="NAME",
                   help="the level whose rate to plan for (default: the slowest)")
    p.add_argument("--harmonic", type=int, default=1)
    g = p.add_argument_group("response size (one of)")
    g.add_argument("--snr", type=float, help="mean single-trial power SNR at the rate "
                   "(linear, as analyze's power_snr; 1 = none)")
    g.add_argument("--snr-db", type=float, help="the same in dB")
    g.add_argument("--itpc", type=float, help="expected single-trial phase coherence (0..1)")
    g.add_argument("--amplitude", type=float, help="response amplitude (with --noise, --sfreq)")
    g.add_argument("--noise", type=float, help="per-sample noise SD, same unit as --amplitude")
    g.add_argument("--sfreq", type=float, help="recording sample rate, Hz (with --amplitude)")
    g.add_argument("--pilot-window", type=float, metavar="S",
                   help="window (s) over which --snr was measured, if not the design's")
    p.add_argument("--trials", type=_ints, default=None, metavar="LIST",
                   help="trials per participant to try (default 10,20,...,200)")
    p.add_argument("--participants", type=_ints, default=None, metavar="LIST",
                   help="participants to try (default 4,8,...,48)")
    p.add_argument("--alpha", type=float, default=0.05)
    p.add_argument("--power", type=float, default=0.8)
    p.add_argument("--tests", type=int, default=None, metavar="M",
                   help="tests in the correction family (channels x rates; default: the "
                   "design's structure rates on one channel)")
    p.add_argument("--test", choices=("t2circ", "itpc", "evoked"), default="t2circ")
    p.add_argument("--sims", type=int, default=1000, help="simulated studies per cell")
    p.add_argument("--seed", type=int, default=None)
    p.add_argument("--json", type=Path, metavar="PATH")
    p.add_argument("--figure", type=Path, metavar="PATH.png", help="write the power curves")
    p.set_defaults(run=run)


def _rates(args):
    from ..errors import AnalysisError

    modes = sum([args.recipe is not None, args.build is not None,
                 args.unit_duration is not None or bool(args.level)])
    if modes != 1:
        raise AnalysisError("give the design one way: a recipe, --build DIR, or "
                            "--unit-duration S --level NAME=SIZE ... --window S")
    if args.recipe is not None:
        from ..recipe import load_recipe

        return load_recipe(args.recipe).rates()
    if args.build is not None:
        from ..audio_io import read_build

        return read_build(args.build).rates
    import warnings
    from fractions import Fraction

    from ..grid import RateWarning, grid_from_numbers

    if args.unit_duration is None or not args.level or args.window is None:
        raise AnalysisError("--unit-duration, at least one --level and --window are needed "
                            "together")
    top = Fraction(args.unit_duration).limit_denominator(10 ** 6)
    for _, size in args.level:
        top *= size
    n = Fraction(args.window).limit_denominator(10 ** 6) / top
    if n.denominator != 1 or n < 1:
        raise AnalysisError(f"--window {args.window:g} s is not a whole number of cycles of the "
                            f"slowest level ({float(top):g} s)")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RateWarning)
        return grid_from_numbers(unit_duration=args.unit_duration, levels=args.level, sr=1000,
                                 n_top_groups=int(n), unit_name=args.unit_name)


def run(args) -> int:
    from ..errors import AnalysisError
    from ..planner import DEFAULT_PARTICIPANTS, DEFAULT_TRIALS, plan_power

    for target in (args.json, args.figure):
        if target is not None and target.exists():
            raise AnalysisError(f"{target} exists; choose another path (stimforge never "
                                "overwrites your files)")
    rates = _rates(args)
    pl = plan_power(rates, level=args.rate_level, harmonic=args.harmonic, snr=args.snr,
                    snr_db=args.snr_db, itpc=args.itpc, amplitude=args.amplitude,
                    noise_sd=args.noise, sfreq=args.sfreq, pilot_window=args.pilot_window,
                    trials=args.trials or DEFAULT_TRIALS,
                    participants=args.participants or DEFAULT_PARTICIPANTS, alpha=args.alpha,
                    power=args.power, n_tests=args.tests, test=args.test, n_sim=args.sims,
                    rng=args.seed)
    print(pl.format_table())
    print()
    print(pl.summary_line() + ".")
    print(f"simulated {pl.settings['n_sim']} studies per cell in {pl.seconds:.1f} s (seed "
          f"{pl.settings['seed']}); the response is assumed phase-locked within a participant "
          "with a different phase in each, in stationary noise: real data with artefacts or "
          "drifting latency need more.")
    if args.json:
        print(f"JSON: {pl.write_json(args.json)}")
    if args.figure:
        args.figure.parent.mkdir(parents=True, exist_ok=True)
        pl.plot().savefig(args.figure, dpi=100)
        print(f"figure: {args.figure}")
    return 0
