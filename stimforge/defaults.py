"""Defaults shared by more than one stage: one source, so the recipe schema, the functions and
the command line cannot drift apart (``tests/test_foundations.py`` checks that they agree)."""

#: Family-wise error rate of the acoustic check (Holm over every test of a set).
ALPHA = 0.01
#: Acoustic onset: where the smoothed envelope first comes within this many dB of its peak.
ONSET_THRESHOLD_DB = -40.0
#: Leading/trailing silence below this many dB re a token's own peak is trimmed from tokens.
TRIM_THRESHOLD_DB = -40.0
