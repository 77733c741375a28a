"""Defaults shared by more than one stage: one source, so the recipe schema, the functions and
the command line cannot drift apart (``tests/test_foundations.py`` checks that they agree)."""

#: Family-wise error rate of the acoustic check (Holm over every test of a set).
ALPHA = 0.01
#: Acoustic onset: where the smoothed envelope first comes within this many dB of its peak.
ONSET_THRESHOLD_DB = -40.0
#: Leading/trailing silence below this many dB re a token's own peak is trimmed from tokens.
TRIM_THRESHOLD_DB = -40.0
#: Reference cue sizes of the acoustic check: it vouches for a set only if it would have
#: revealed a level step of this many dB on the first unit of every group, a silent gap of this
#: many ms closing every group and a pitch step of this many semitones on its last unit, at
#: every level (recipe ``check.reference``, ``stimforge check --ref-*``).
REFERENCE_LEVEL_STEP_DB = 1.0
REFERENCE_GAP_MS = 20.0
REFERENCE_PITCH_STEP_ST = 1.0
#: Most worker processes a build or a check may start (recipe retime.jobs, --jobs).
MAX_JOBS = 256
