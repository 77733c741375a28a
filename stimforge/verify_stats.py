"""Deprecated alias: the statistics live in :mod:`stimforge.stats`, the ERB scale in
:mod:`stimforge.envelopes`.  Kept for one release so that old imports keep working."""

from .envelopes import erb, erb_number, erb_space  # noqa: F401
from .stats import *  # noqa: F401,F403
from .stats import __all__ as _stats_all

__all__ = ["erb", "erb_number", "erb_space", *_stats_all]
