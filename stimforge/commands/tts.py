"""`stimforge tts OUT_DIR LABEL ...`: synthesise a token corpus with the bundled espeak-ng."""

from __future__ import annotations

import re
import sys
from pathlib import Path


def add_parser(sub) -> None:
    p = sub.add_parser(
        "tts",
        help="synthesise one token per label with espeak-ng (needs stimforge[tts])",
        description="Write one WAV per label into OUT_DIR/tokens and an OUT_DIR/index.csv that "
        "`stimforge inspect` and recipes accept. A label is read as text by the voice; to speak "
        "espeak phonemes instead, give LABEL=[[...]] or a --labels-file line 'label [[...]]'. "
        "Never overwrites existing files.",
    )
    p.add_argument("out_dir", type=Path, metavar="OUT_DIR", help="corpus folder to write")
    p.add_argument(
        "labels", nargs="*", metavar="LABEL",
        help="labels to synthesise; LABEL=TEXT speaks TEXT for LABEL, e.g. ka=[[ka]]",
    )
    p.add_argument("--voice", default="en", help="espeak-ng voice, e.g. en, es, de (default en)")
    p.add_argument("--rate", type=int, default=160, metavar="WPM",
                   help="speaking rate in words per minute (default 160)")
    p.add_argument("--pitch", type=int, default=50, metavar="P",
                   help="espeak pitch 0-99 (default 50)")
    p.add_argument(
        "--labels-file", type=Path, metavar="FILE",
        help="one label per line, optionally followed by a tab (or spaces) and the text to speak, "
        "e.g. 'ka [[ka]]'; '#' starts a comment",
    )
    p.set_defaults(run=run)


def _read_labels_file(path: Path) -> list[dict]:
    from ..errors import CorpusError

    try:
        text = path.read_text(encoding="utf-8-sig")
    except OSError as exc:
        raise CorpusError(f"{path}: cannot read the labels file: {exc}") from None
    out = []
    for line in text.splitlines():
        line = re.sub(r"(^|\s)#.*$", "", line).strip()
        if not line:
            continue
        parts = line.split(None, 1)
        entry = {"label": parts[0]}
        if len(parts) > 1:
            entry["text"] = parts[1].strip()
        out.append(entry)
    return out


def run(args) -> int:
    from ..errors import CorpusError
    from ..tts import make_corpus

    entries: list = []
    for item in args.labels:
        label, sep, text = item.partition("=")
        entries.append({"label": label, "text": text} if sep and text else label)
    if args.labels_file is not None:
        entries += _read_labels_file(args.labels_file)
    if not entries:
        raise CorpusError("give at least one LABEL or a --labels-file")
    from .build import file_in_the_way

    blocker = file_in_the_way(args.out_dir / "x")
    if blocker is not None:
        raise CorpusError(f"{args.out_dir}: {blocker} is a file, not a folder; choose another "
                          "OUT_DIR")
    try:
        index = make_corpus(
            entries, args.out_dir, voice=args.voice, rate_wpm=args.rate, pitch=args.pitch,
            progress=sys.stderr.isatty(),
        )
    except OSError as exc:  # a folder on the way that is a file, no permission, a full disk
        raise CorpusError(f"{args.out_dir}: cannot write the corpus there "
                          f"({exc.filename or args.out_dir}: {exc.strerror or exc}); choose "
                          "another OUT_DIR") from None
    print(f"wrote {len(entries)} token(s) and {index}; check them with: stimforge inspect {args.out_dir}")
    return 0
