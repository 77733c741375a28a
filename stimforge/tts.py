"""A bundled token source: one token per label, synthesised with espeak-ng.

espeak-ng comes from the ``espeakng-loader`` wheel (library and voice data inside the wheel, no
system package); stimforge talks to it through :mod:`ctypes`.  Install it with
``pip install "stimforge[tts]"``.

Input text
----------
The text is handed to espeak with phoneme input switched on: plain text is read by the voice's
spelling rules, and anything inside ``[[...]]`` is read as espeak phoneme mnemonics (e.g.
``[[ka]]``).  For syllables of an invented language, phoneme input is the safer choice: plain
text like ``"se"`` may be read as a word or a letter name.  :func:`make_corpus` takes a ``text``
per entry for this (default: the label as plain text).

State and determinism
---------------------
espeak's library state is global to the process: it is initialised once (on first use), and every
call runs under one module lock, so threads are safe but serialised.  Its random generator is
re-seeded before every synthesis, yet some internal state (e.g. the phase of its pitch "flutter")
carries over from call to call: the same text gives slightly different samples on the first and
the second call in a process.  A fresh process that makes the same calls in the same order gives
byte-identical output, which is what ``demo_corpus/make_demo_corpus.py`` relies on.

Licence: the espeak-ng library and its voice data are GPL-3.0; audio made with them is yours,
but say where it came from.
"""

from __future__ import annotations

import csv
import ctypes
import logging
import re
import threading
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Mapping

import numpy as np

from .errors import BuildError, CorpusError

__all__ = ["TTSEntry", "synthesize", "make_corpus", "list_voices", "INSTALL_HINT"]

log = logging.getLogger("stimforge")

INSTALL_HINT = 'pip install "stimforge[tts]"'

# espeak_lib.h constants
_AUDIO_OUTPUT_SYNCHRONOUS = 2
_INITIALIZE_DONT_EXIT = 0x8000
_POS_CHARACTER = 1
_CHARS_UTF8 = 1
_PHONEMES = 0x100
_PARAM_RATE = 1
_PARAM_PITCH = 3
_RAND_SEED = 20261201

_LOCK = threading.RLock()
_ENGINE: "_Engine | None" = None


class _Engine:
    """The process-wide espeak-ng handle (created once, used under ``_LOCK``)."""

    def __init__(self) -> None:
        try:
            import espeakng_loader
        except ImportError:
            raise BuildError(
                "text-to-speech needs the optional package espeakng-loader, which is not "
                f"installed; install it with: {INSTALL_HINT}"
            ) from None
        lib_path = espeakng_loader.get_library_path()
        try:
            data_path = espeakng_loader.get_data_path()
            lib = ctypes.CDLL(lib_path)
        except (OSError, RuntimeError) as exc:
            raise BuildError(
                f"cannot load espeak-ng from the espeakng-loader package ({lib_path}): {exc}; "
                f"reinstall it with: {INSTALL_HINT}"
            ) from None
        self.data_path = Path(data_path)
        lib.espeak_Initialize.restype = ctypes.c_int
        lib.espeak_Initialize.argtypes = [ctypes.c_int, ctypes.c_int, ctypes.c_char_p, ctypes.c_int]
        lib.espeak_SetVoiceByName.restype = ctypes.c_int
        lib.espeak_SetVoiceByName.argtypes = [ctypes.c_char_p]
        lib.espeak_SetParameter.restype = ctypes.c_int
        lib.espeak_SetParameter.argtypes = [ctypes.c_int, ctypes.c_int, ctypes.c_int]
        lib.espeak_Synth.restype = ctypes.c_int
        lib.espeak_Synth.argtypes = [
            ctypes.c_void_p, ctypes.c_size_t, ctypes.c_uint, ctypes.c_int, ctypes.c_uint,
            ctypes.c_uint, ctypes.c_void_p, ctypes.c_void_p,
        ]
        lib.espeak_Synchronize.restype = ctypes.c_int
        lib.espeak_ng_SetRandSeed.restype = None
        lib.espeak_ng_SetRandSeed.argtypes = [ctypes.c_long]
        sr = lib.espeak_Initialize(
            _AUDIO_OUTPUT_SYNCHRONOUS, 0, str(self.data_path).encode(), _INITIALIZE_DONT_EXIT
        )
        if sr <= 0:
            raise BuildError(
                f"espeak-ng failed to initialise (code {sr}) with data at {self.data_path}; "
                f"reinstall it with: {INSTALL_HINT}"
            )
        self.lib = lib
        self.sr = int(sr)
        self._chunks: list[np.ndarray] = []
        callback_type = ctypes.CFUNCTYPE(
            ctypes.c_int, ctypes.POINTER(ctypes.c_short), ctypes.c_int, ctypes.c_void_p
        )

        def _collect(wav, n, _events):  # called by espeak during espeak_Synth
            if wav and n > 0:
                self._chunks.append(np.ctypeslib.as_array(wav, shape=(n,)).copy())
            return 0

        self._callback = callback_type(_collect)  # keep a reference: espeak holds the pointer
        lib.espeak_SetSynthCallback(self._callback)

    def speak(self, text: str, *, voice: str, rate_wpm: int, pitch: int) -> np.ndarray:
        if self.lib.espeak_SetVoiceByName(voice.encode("utf-8")) != 0:
            some = ", ".join(list_voices()[:40])
            raise CorpusError(
                f"espeak-ng has no voice {voice!r}; use a language code such as en, en-us, de, "
                f"es, it, fi (optionally with a variant, e.g. 'es+f3'); available: {some}, ..."
            )
        self.lib.espeak_SetParameter(_PARAM_RATE, int(rate_wpm), 0)
        self.lib.espeak_SetParameter(_PARAM_PITCH, int(pitch), 0)
        self.lib.espeak_ng_SetRandSeed(_RAND_SEED)
        self._chunks = []
        buf = text.encode("utf-8") + b"\0"
        err = self.lib.espeak_Synth(
            buf, len(buf), 0, _POS_CHARACTER, 0, _CHARS_UTF8 | _PHONEMES, None, None
        )
        self.lib.espeak_Synchronize()
        if err != 0:
            raise BuildError(f"espeak-ng could not synthesise {text!r} (error code {err})")
        if not self._chunks:
            return np.zeros(0)
        out = np.concatenate(self._chunks).astype(np.float64) / 32768.0
        self._chunks = []
        return out


def _engine() -> _Engine:
    global _ENGINE
    with _LOCK:
        if _ENGINE is None:
            _ENGINE = _Engine()
        return _ENGINE


def list_voices() -> list[str]:
    """Names of the espeak-ng voices (language codes) shipped with espeakng-loader, sorted."""
    with _LOCK:
        eng = _engine()
    lang = eng.data_path / "lang"
    return sorted({p.name for p in lang.rglob("*") if p.is_file()})


def _check_params(rate_wpm: Any, pitch: Any, *, where: str) -> tuple[int, int]:
    try:
        r, p = int(rate_wpm), int(pitch)
    except (TypeError, ValueError):
        raise CorpusError(
            f"{where}: rate_wpm and pitch must be integers, got {rate_wpm!r} and {pitch!r}"
        ) from None
    if not 80 <= r <= 450:
        raise CorpusError(f"{where}: rate_wpm must lie in 80..450 words per minute, got {r}")
    if not 0 <= p <= 99:
        raise CorpusError(f"{where}: pitch must lie in 0..99 (espeak's scale, 50 = default), got {p}")
    return r, p


def synthesize(
    text: str, *, voice: str = "en", rate_wpm: int = 160, pitch: int = 50
) -> tuple[np.ndarray, int]:
    """Synthesise ``text`` with espeak-ng.

    Parameters
    ----------
    text : str
        Plain text, or espeak phonemes inside ``[[...]]`` (e.g. ``"[[ka]]"``).
    voice : str
        espeak-ng voice, e.g. ``"en"``, ``"es"``, ``"de"``, optionally ``"+variant"``.
    rate_wpm : int, words per minute in 80..450
        Speaking rate; faster gives shorter syllables.
    pitch : int, 0..99
        espeak's pitch setting (50 = the voice's default; about 80 Hz at 30, 120 Hz at 70 for the
        default male voices, measured with Praat).

    Returns
    -------
    samples : ndarray, float64, 1-D, in [-1, 1)
        espeak's int16 output divided by 32768, with espeak's own leading/trailing silence.
    sr : int, Hz
        espeak's sample rate (22050).

    Examples
    --------
    >>> x, sr = synthesize("[[ma]]", voice="es")  # doctest: +SKIP
    """
    if not isinstance(text, str) or not text.strip():
        raise CorpusError(f"nothing to synthesise: text is {text!r}; give a non-empty string")
    r, p = _check_params(rate_wpm, pitch, where=f"synthesize({text!r})")
    with _LOCK:
        eng = _engine()
        x = eng.speak(text, voice=str(voice), rate_wpm=r, pitch=p)
        sr = eng.sr
    if x.size == 0 or not np.any(x):
        raise CorpusError(
            f"espeak-ng produced no sound for {text!r} with voice {voice!r}; check the text "
            "(phonemes go inside [[...]])"
        )
    return x, sr


@dataclass(frozen=True)
class TTSEntry:
    """One token to synthesise.

    ``None`` fields take the defaults given to :func:`make_corpus`.  ``text`` is what espeak
    reads (default: the label); ``gain_db`` scales the samples before writing (it must not push
    them past full scale); ``metadata`` adds extra index.csv columns (e.g. ``{"take": "1"}``);
    ``name`` sets the WAV file stem (default: the label, made file-safe, numbered when a label
    has several entries).
    """

    label: str
    text: str | None = None
    voice: str | None = None
    rate_wpm: int | None = None
    pitch: int | None = None
    gain_db: float = 0.0
    name: str | None = None
    metadata: Mapping[str, str] = field(default_factory=dict)


def _as_entry(item: Any, i: int) -> TTSEntry:
    if isinstance(item, TTSEntry):
        return item
    if isinstance(item, str):
        return TTSEntry(label=item)
    if isinstance(item, Mapping):
        known = {"label", "text", "voice", "rate_wpm", "pitch", "gain_db", "name", "metadata"}
        d = dict(item)
        extra = {k: str(v) for k, v in d.items() if k not in known}
        meta = {**{str(k): str(v) for k, v in dict(d.get("metadata") or {}).items()}, **extra}
        if "label" not in d:
            raise CorpusError(f"entry {i + 1}: a mapping entry needs a 'label' key, got {sorted(d)}")
        return TTSEntry(
            label=d["label"], text=d.get("text"), voice=d.get("voice"), rate_wpm=d.get("rate_wpm"),
            pitch=d.get("pitch"), gain_db=float(d.get("gain_db", 0.0)), name=d.get("name"),
            metadata=meta,
        )
    raise CorpusError(
        f"entry {i + 1}: expected a label (str), a mapping or a TTSEntry, got {type(item).__name__}"
    )


_SAFE = re.compile(r"[^\w\-]+")
_RESERVED = ("label", "file", "voice", "rate_wpm", "pitch", "text", "gain_db")


def _check_entries(entries: list[TTSEntry]) -> None:
    """One CorpusError listing every unusable label and reserved metadata key."""
    problems = []
    for i, e in enumerate(entries):
        lab = e.label
        if not isinstance(lab, str) or not lab.strip():
            problems.append(f"entry {i + 1}: empty label {lab!r}")
        elif re.search(r"[\s|#]", lab):
            problems.append(
                f"entry {i + 1}: label {lab!r} contains whitespace, '|' or '#', which the material "
                "text format reserves"
            )
        for k in e.metadata:
            if k in _RESERVED:
                problems.append(f"entry {i + 1}: metadata key {k!r} clashes with a reserved column")
    if problems:
        raise CorpusError("make_corpus: " + "; ".join(problems))


def _file_names(entries: list[TTSEntry], *, audio_dir: str) -> list[str]:
    """Relative WAV paths: the label's stem, numbered when a label has several entries."""
    counts: dict[str, int] = {}
    for e in entries:
        counts[e.label] = counts.get(e.label, 0) + 1
    seen: dict[str, int] = {}
    used: set[str] = set()
    rel_files = []
    for e in entries:
        if e.name is not None:
            stem = _SAFE.sub("_", str(e.name)).strip("_") or "token"
        else:
            stem = _SAFE.sub("_", e.label).strip("_") or "token"
            if counts[e.label] > 1:
                seen[e.label] = seen.get(e.label, 0) + 1
                stem = f"{stem}_{seen[e.label]}"
        base, k = stem, 1
        while stem.lower() in used:
            k += 1
            stem = f"{base}-{k}"
        used.add(stem.lower())
        rel_files.append(f"{audio_dir}/{stem}.wav" if audio_dir else f"{stem}.wav")
    return rel_files


def _render(entries: list[TTSEntry], *, voice: str, rate_wpm: int, pitch: int,
            progress: bool) -> list[tuple]:
    """Synthesise every entry: (entry, voice, rate, pitch, text, samples, sr) each."""
    from tqdm.auto import tqdm

    rendered = []
    for i, e in enumerate(tqdm(entries, desc="synthesising", unit="token", disable=not progress)):
        v = e.voice if e.voice is not None else voice
        r, p = _check_params(
            e.rate_wpm if e.rate_wpm is not None else rate_wpm,
            e.pitch if e.pitch is not None else pitch,
            where=f"entry {i + 1} ({e.label})",
        )
        text = e.text if e.text is not None else e.label
        x, sr = synthesize(text, voice=v, rate_wpm=r, pitch=p)
        y = x * 10.0 ** (float(e.gain_db) / 20.0)
        limit = 32767 / 32768
        if np.max(np.abs(y)) > limit:
            raise CorpusError(
                f"entry {i + 1} ({e.label}): gain_db {e.gain_db:+g} would clip (peak "
                f"{20 * np.log10(np.max(np.abs(y))):+.2f} dBFS); lower gain_db"
            )
        rendered.append((e, v, r, p, text, y, sr))
    return rendered


def make_corpus(
    labels_or_specs: Iterable[str | Mapping[str, Any] | TTSEntry],
    out_dir: str | Path,
    *,
    voice: str = "en",
    rate_wpm: int = 160,
    pitch: int = 50,
    audio_dir: str = "tokens",
    subtype: str = "PCM_16",
    progress: bool = True,
) -> Path:
    """Synthesise one WAV per entry and write an ``index.csv`` that :func:`stimforge.corpus.load_index` reads.

    Parameters
    ----------
    labels_or_specs : iterable of str, mapping or TTSEntry
        A plain label is read as text with the defaults below; a mapping or :class:`TTSEntry`
        may set its own text, voice, rate_wpm, pitch, gain_db, name and metadata (any other
        mapping key becomes a metadata column).  Several entries may share a label (takes).
    out_dir : path
        Corpus folder; created if needed.  ``index.csv`` goes here, the WAVs into
        ``out_dir/audio_dir``.
    voice, rate_wpm, pitch
        Defaults for entries that do not set them (see :func:`synthesize`).
    subtype : str
        WAV subtype (PCM_16 default: byte-identical across runs).
    progress : bool
        Show a progress bar.

    Returns
    -------
    Path
        The written ``index.csv``; columns ``label, file``, the metadata columns, then
        ``voice, rate_wpm, pitch, text, gain_db``.

    Raises
    ------
    BuildError
        If ``index.csv`` or any target WAV already exists (nothing is overwritten; nothing is
        written then), or espeak-ng is unavailable.
    CorpusError
        For an empty list, empty or unusable labels, out-of-range parameters, or a gain that
        would clip.
    """
    import soundfile as sf

    entries = [_as_entry(item, i) for i, item in enumerate(labels_or_specs)]
    if not entries:
        raise CorpusError("make_corpus: no labels given; pass at least one label")
    _check_entries(entries)

    out_dir = Path(out_dir)
    rel_files = _file_names(entries, audio_dir=audio_dir)

    index_path = out_dir / "index.csv"
    exists = [index_path] if index_path.exists() else []
    exists += [out_dir / f for f in rel_files if (out_dir / f).exists()]
    if exists:
        shown = ", ".join(str(p) for p in exists[:5]) + (" ..." if len(exists) > 5 else "")
        raise BuildError(
            f"make_corpus: {len(exists)} file(s) already exist ({shown}); stimforge never "
            "overwrites a corpus: choose an empty folder or delete them first"
        )

    # synthesise everything first, so a failure leaves no half-written corpus
    rendered = _render(entries, voice=voice, rate_wpm=rate_wpm, pitch=pitch, progress=progress)

    meta_cols: list[str] = []
    for e in entries:
        for k in e.metadata:
            if k not in meta_cols:
                meta_cols.append(k)
    (out_dir / audio_dir if audio_dir else out_dir).mkdir(parents=True, exist_ok=True)
    rows = []
    for (e, v, r, p, text, y, sr), rel in zip(rendered, rel_files):
        with open(out_dir / rel, "xb") as fh:
            sf.write(fh, y, sr, subtype=subtype, format="WAV")
        row = {"label": e.label, "file": rel}
        row.update({k: str(e.metadata.get(k, "")) for k in meta_cols})
        row.update(
            {"voice": v, "rate_wpm": str(r), "pitch": str(p), "text": text,
             "gain_db": f"{float(e.gain_db):g}"}
        )
        rows.append(row)
    with open(index_path, "x", encoding="utf-8", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=["label", "file", *meta_cols, *_RESERVED[2:]])
        w.writeheader()
        w.writerows(rows)
    log.info("wrote %d token(s) and %s", len(rows), index_path)
    return index_path
