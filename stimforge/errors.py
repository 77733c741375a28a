"""Exception hierarchy.

Every error stimforge raises on purpose derives from :class:`StimforgeError` and also from
the builtin that best describes it, so ``except ValueError`` keeps working for callers that
do not know stimforge.  Messages name the file, field or value and say what would fix it.
"""

from __future__ import annotations


class StimforgeError(Exception):
    """Base class of all stimforge errors."""


class RecipeError(StimforgeError, ValueError):
    """A recipe is malformed: a missing, misspelt or out-of-range field."""


class CorpusError(StimforgeError, ValueError):
    """A token corpus cannot be read: missing, empty, truncated or non-audio files."""


class AudioInputError(StimforgeError, ValueError):
    """A signal handed to a processing function is unusable (NaN, empty, too short...)."""


class RetimeError(StimforgeError, ValueError):
    """A token cannot be re-timed under the recipe's policy (e.g. stretch out of range)."""


class DesignError(StimforgeError, ValueError):
    """Material or conditions cannot be turned into trials (missing labels, impossible constraints)."""


class BuildError(StimforgeError, RuntimeError):
    """A build cannot proceed (output folder not empty, write failure...)."""


class CheckInputError(StimforgeError, ValueError):
    """The acoustic check was given audio or a grid it cannot use."""


class GridError(StimforgeError, ValueError):
    """A rate table cannot be formed: a unit duration, level size or window that does not fit."""


class StatsError(StimforgeError, ValueError):
    """A statistic was given arrays it cannot use (too few trials, wrong shape or axis)."""


class AnalysisError(StimforgeError, ValueError):
    """Recorded responses cannot be analysed as given (epochs, rates or labels that do not fit)."""


class EpochError(StimforgeError, ValueError):
    """A recording cannot be cut into epochs: codes that do not match the plan, a bad window..."""


class EpochMismatch(EpochError):
    """The codes found in a recording disagree with the list's plan (every disagreement listed)."""
