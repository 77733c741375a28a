"""On-disk cache of WORLD analyses, so each distinct token is analysed once.

WORLD analysis (Harvest or DIO + StoneMask, CheapTrick, D4C) costs far more than synthesis
(about 0.4 CPU seconds per second of audio against 0.05), and a build re-times every token
once per slot length.  This module stores each analysis once, keyed by what determines it.

Key
    ``sha256`` over the token's float64 sample bytes, its sample rate, every analysis
    parameter (estimator, frame period, F0 range, FFT size, context padding, D4C threshold)
    and ``stimforge.__version__``.  Change any of them and the key changes.

Location
    ``RetimeSpec.cache_dir`` if given, else ``$XDG_CACHE_HOME/stimforge`` or
    ``~/.cache/stimforge``; entries live in its ``world-analysis/`` sub-folder, one ``.npz``
    file per key.  Clear it with :meth:`AnalysisCache.clear` or by deleting the folder.

Safety
    Entries are written to a temporary file in the same folder and moved into place with
    :func:`os.replace`, so a reader never sees half a file.  Each entry holds its own key,
    the stimforge version and a sha256 checksum over its arrays; an entry that cannot be read,
    whose checksum or key does not match, or whose shapes disagree is logged, deleted and
    recomputed, never trusted.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import tempfile
from collections import OrderedDict
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import numpy as np

__all__ = ["WorldAnalysis", "AnalysisCache", "default_cache_dir", "analysis_key"]

logger = logging.getLogger("stimforge")

_SUBDIR = "world-analysis"
_ARRAYS = ("f0", "sp", "ap")


def default_cache_dir() -> Path:
    """The user cache folder: ``$XDG_CACHE_HOME/stimforge`` or ``~/.cache/stimforge``."""
    base = os.environ.get("XDG_CACHE_HOME")
    root = Path(base).expanduser() if base else Path.home() / ".cache"
    return root / "stimforge"


@dataclass(frozen=True, repr=False)
class WorldAnalysis:
    """WORLD parameters of one (context-padded) token.

    Attributes
    ----------
    f0 : ndarray, (n_frames,), Hz
        0 where unvoiced.  Frame ``k`` sits at ``k * frame_period / 1000`` s of the *padded*
        signal.
    sp : ndarray, (n_frames, fft_size // 2 + 1)
        Spectral envelope (squared magnitude), CheapTrick.
    ap : ndarray, (n_frames, fft_size // 2 + 1)
        Aperiodicity, D4C; never overwritten downstream.
    sr : int, Hz
    frame_period : float, ms
    pad : int, samples
        Silence added before (and after) the token before analysis.
    n_token : int, samples
        Length of the token itself (without padding).
    fft_size : int
    """

    f0: np.ndarray
    sp: np.ndarray
    ap: np.ndarray
    sr: int
    frame_period: float
    pad: int
    n_token: int
    fft_size: int
    params: dict[str, Any] = field(default_factory=dict)

    def __repr__(self) -> str:
        voiced = int(np.count_nonzero(self.f0 > 0))
        return (
            f"WorldAnalysis({self.f0.size} frames x {self.sp.shape[1]} bins, sr={self.sr}, "
            f"frame_period={self.frame_period} ms, voiced={voiced}, pad={self.pad}, "
            f"n_token={self.n_token})"
        )

    def checksum(self) -> str:
        """sha256 over the arrays (name, dtype, shape, bytes) and the scalar fields."""
        h = hashlib.sha256()
        for name in _ARRAYS:
            a = np.ascontiguousarray(getattr(self, name))
            h.update(name.encode())
            h.update(str(a.dtype).encode())
            h.update(repr(a.shape).encode())
            h.update(a.tobytes())
        h.update(
            json.dumps(
                [self.sr, self.frame_period, self.pad, self.n_token, self.fft_size], sort_keys=True
            ).encode()
        )
        return h.hexdigest()

    def consistent(self) -> bool:
        """Shapes agree with each other and with ``fft_size``; values are finite."""
        n = self.f0.shape[0] if self.f0.ndim == 1 else -1
        bins = self.fft_size // 2 + 1
        return (
            n > 0
            and self.sp.shape == (n, bins)
            and self.ap.shape == (n, bins)
            and bool(np.all(np.isfinite(self.f0)))
            and bool(np.all(np.isfinite(self.sp)))
            and bool(np.all(np.isfinite(self.ap)))
        )


def analysis_key(x: np.ndarray, *, sr: int, params: dict[str, Any]) -> str:
    """Cache key of a token's analysis: sha256 of samples + sr + params + stimforge version."""
    from ._version import __version__

    a = np.ascontiguousarray(x, dtype=np.float64)
    h = hashlib.sha256()
    h.update(a.tobytes())
    h.update(json.dumps({"sr": int(sr), "params": params, "version": __version__},
                        sort_keys=True).encode())
    return h.hexdigest()


class AnalysisCache:
    """Disk cache (plus a small in-memory layer) of :class:`WorldAnalysis` objects.

    Parameters
    ----------
    directory : str or Path or None
        Cache root (entries go to ``directory/world-analysis``).  ``None``: memory only
        (nothing written to disk).
    memory_items : int
        Analyses kept in memory (most recently used), so a token re-timed to two slot lengths
        in one process is analysed or read once.

    Examples
    --------
    >>> import tempfile
    >>> c = AnalysisCache(tempfile.mkdtemp())
    >>> c.stats
    {'hits': 0, 'misses': 0, 'rejected': 0, 'writes': 0}
    """

    def __init__(self, directory: str | Path | None, *, memory_items: int = 8) -> None:
        self.directory = None if directory is None else Path(directory).expanduser()
        self._memory: OrderedDict[str, WorldAnalysis] = OrderedDict()
        self._memory_items = int(memory_items)
        self.stats = {"hits": 0, "misses": 0, "rejected": 0, "writes": 0}

    def __repr__(self) -> str:
        where = "memory only" if self.directory is None else str(self.entry_dir)
        return f"AnalysisCache({where}, stats={self.stats})"

    @property
    def entry_dir(self) -> Path | None:
        return None if self.directory is None else self.directory / _SUBDIR

    def path_for(self, key: str) -> Path | None:
        """File that holds (or would hold) the entry ``key``."""
        return None if self.entry_dir is None else self.entry_dir / f"{key}.npz"

    # ------------------------------------------------------------------ public
    def get_or_compute(self, key: str, compute: Callable[[], WorldAnalysis]) -> WorldAnalysis:
        """Return the cached analysis for ``key``, computing and storing it if absent or bad."""
        hit = self._memory.get(key)
        if hit is not None:
            self._memory.move_to_end(key)
            self.stats["hits"] += 1
            return hit
        ana = self.load(key)
        if ana is not None:
            self.stats["hits"] += 1
        else:
            self.stats["misses"] += 1
            ana = compute()
            self.store(key, ana)
        self._remember(key, ana)
        return ana

    def load(self, key: str) -> WorldAnalysis | None:
        """Read and verify an entry; ``None`` if absent or rejected (rejected ones are deleted)."""
        path = self.path_for(key)
        if path is None or not path.exists():
            return None
        try:
            with open(path, "rb") as fh, np.load(fh, allow_pickle=False) as z:
                arrays = {n: np.array(z[n], dtype=np.float64) for n in _ARRAYS}
                meta = json.loads(str(z["meta"]))
        except Exception as exc:  # noqa: BLE001 - any unreadable entry is rejected
            self._reject(path, f"unreadable ({type(exc).__name__}: {exc})")
            return None
        try:
            ana = WorldAnalysis(
                f0=arrays["f0"], sp=arrays["sp"], ap=arrays["ap"], sr=int(meta["sr"]),
                frame_period=float(meta["frame_period"]), pad=int(meta["pad"]),
                n_token=int(meta["n_token"]), fft_size=int(meta["fft_size"]),
                params=dict(meta.get("params", {})),
            )
        except (KeyError, TypeError, ValueError) as exc:
            self._reject(path, f"incomplete metadata ({exc})")
            return None
        from ._version import __version__

        if meta.get("key") != key:
            self._reject(path, "stored key does not match its file name (stale or moved entry)")
            return None
        if meta.get("version") != __version__:
            self._reject(path, f"written by stimforge {meta.get('version')}, not {__version__}")
            return None
        if not ana.consistent():
            self._reject(path, "array shapes or values are inconsistent")
            return None
        if ana.checksum() != meta.get("checksum"):
            self._reject(path, "checksum mismatch (corrupted entry)")
            return None
        return ana

    def store(self, key: str, ana: WorldAnalysis) -> None:
        """Write an entry atomically (temporary file + os.replace).  Failures only log."""
        path = self.path_for(key)
        if path is None:
            return
        from ._version import __version__

        meta = {
            "key": key,
            "version": __version__,
            "checksum": ana.checksum(),
            "sr": ana.sr,
            "frame_period": ana.frame_period,
            "pad": ana.pad,
            "n_token": ana.n_token,
            "fft_size": ana.fft_size,
            "params": ana.params,
        }
        tmp = None
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
            fd, tmp = tempfile.mkstemp(prefix=f".{key[:16]}.", suffix=".tmp", dir=path.parent)
            with os.fdopen(fd, "wb") as fh:
                np.savez(fh, f0=ana.f0, sp=ana.sp, ap=ana.ap, meta=np.array(json.dumps(meta)))
                fh.flush()
                os.fsync(fh.fileno())
            os.replace(tmp, path)
            tmp = None
            self.stats["writes"] += 1
        except OSError as exc:
            logger.warning("analysis cache: cannot write %s (%s); continuing without it", path, exc)
        finally:
            if tmp is not None:
                try:
                    os.unlink(tmp)
                except OSError:
                    pass

    def clear(self) -> int:
        """Delete every entry (and the in-memory layer).  Returns the number of files removed."""
        self._memory.clear()
        n = 0
        if self.entry_dir is not None and self.entry_dir.is_dir():
            for p in self.entry_dir.iterdir():
                if p.suffix in (".npz", ".tmp"):
                    try:
                        p.unlink()
                        n += 1
                    except OSError as exc:
                        logger.warning("analysis cache: cannot delete %s (%s)", p, exc)
        return n

    def forget_memory(self) -> None:
        """Drop the in-memory layer only (the next read goes to disk)."""
        self._memory.clear()

    # ------------------------------------------------------------------ internals
    def _remember(self, key: str, ana: WorldAnalysis) -> None:
        self._memory[key] = ana
        self._memory.move_to_end(key)
        while len(self._memory) > self._memory_items:
            self._memory.popitem(last=False)

    def _reject(self, path: Path, why: str) -> None:
        self.stats["rejected"] += 1
        logger.warning("analysis cache: entry %s rejected: %s; recomputing", path.name, why)
        try:
            path.unlink()
        except OSError:
            pass
