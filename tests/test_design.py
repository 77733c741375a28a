"""Tests for stimforge.design: material, conditions, balance, constraints, lists."""

from __future__ import annotations

import itertools
import json
import logging
from collections import Counter

import numpy as np
import pytest

from stimforge.design import (
    Design,
    generate_material,
    level_units,
    make_design,
    parse_material,
    williams_rows,
)
from stimforge.errors import DesignError
from stimforge.recipe import GenerateSpec, HierarchySpec, recipe_from_dict

# Invented syllable inventory (no real material).
SYLS = "ka mo ri se tu na pe lo ba di ku to ne su la fi".split()


# --------------------------------------------------------------------------- fixtures
@pytest.fixture
def design_seed() -> int:
    return 20261201


@pytest.fixture
def h2() -> HierarchySpec:
    return HierarchySpec(
        unit={"name": "syllable", "duration": 0.25},
        levels=[{"name": "word", "size": 2}, {"name": "line", "size": 2}],
    )


@pytest.fixture
def h3() -> HierarchySpec:
    return HierarchySpec(
        unit={"name": "syllable", "duration": 0.25},
        levels=[
            {"name": "word", "size": 2},
            {"name": "line", "size": 2},
            {"name": "couplet", "size": 2},
        ],
    )


def _pool(labels=SYLS, n=3):
    return {lab: [f"{lab}/{i}.wav" for i in range(n)] for lab in labels}


def _material_text(n_lines: int, seed: int = 7) -> str:
    """Lines of two invented two-syllable words, no repeated syllable inside a word."""
    g = np.random.default_rng(seed)
    words = []
    for a, b in itertools.permutations(SYLS, 2):
        words.append(f"{a} {b}")
    out = []
    for _ in range(n_lines):
        i, j = g.choice(len(words), size=2, replace=False)
        out.append(f"{words[i]} | {words[j]} ||")
    return "\n".join(out) + "\n"


def _recipe(tmp_path, *, text=None, generate=None, levels=None, conditions=None, **kw):
    if text is not None:
        (tmp_path / "material.txt").write_text(text, encoding="utf-8")
        material = {"text": "material.txt"}
    else:
        material = {"generate": generate}
    data = {
        "name": "t",
        "seed": 5,
        "hierarchy": {
            "unit": {"name": "syllable", "duration": 0.25},
            "levels": levels or [{"name": "word", "size": 2}, {"name": "line", "size": 2}],
        },
        "corpus": {"index": "tokens/index.csv"},
        "material": material,
        "conditions": conditions
        or [
            {"name": "intact", "kind": "intact"},
            {"name": "syl", "kind": "scramble", "level": "syllable"},
            {"name": "wrd", "kind": "scramble", "level": "word"},
            {"name": "rev", "kind": "reverse"},
        ],
        "trials": {"groups_per_trial": 5, "per_condition": 6, "lists": 1},
    }
    for key, value in kw.items():
        if isinstance(value, dict) and isinstance(data.get(key), dict):
            data[key] = {**data[key], **value}
        else:
            data[key] = value
    return recipe_from_dict(data, base_dir=tmp_path)


@pytest.fixture
def recipe(tmp_path):
    return _recipe(tmp_path, text=_material_text(40))


# --------------------------------------------------------------------------- parsing
def test_parse_depth2(h2):
    text = "# header\nka mo | ri se ||\ntu na | pe\nlo ||  # comment\nba di|ku to\n"
    groups = parse_material(text, hierarchy=h2)
    # expected groups: read off the text above (calc); the last line omits its final marker
    # and uses attached markers
    assert groups == [
        ("ka", "mo", "ri", "se"),
        ("tu", "na", "pe", "lo"),
        ("ba", "di", "ku", "to"),
    ]


def test_parse_depth3(h3):
    text = (
        "# couplet 1\n"
        "ka mo | ri se ||  tu na | pe lo |||\n"
        "# couplet 2, written across lines, lower markers implied by the higher one\n"
        "ba di | ku to ||\n"
        "ne su | la fi |||\n"
    )
    groups = parse_material(text, hierarchy=h3)
    assert groups == [
        tuple("ka mo ri se tu na pe lo".split()),
        tuple("ba di ku to ne su la fi".split()),
    ]  # read off the text (calc)
    # a '|||' directly after the last word closes word, line and couplet at once
    assert parse_material("a b | c d || e f | g h |||", hierarchy=h3) == [
        tuple("abcdefgh")
    ]


@pytest.mark.parametrize(
    "text, match",
    [
        ("ka mo ri | se tu ||", r"m\.txt:1: line 1, word 1 .*word holds 3 syllables, needs 2"),
        ("ka mo | ri se | tu na ||", r"m\.txt:1: line 1 .*line holds 3 words, needs 2"),
        ("ka mo | ri se ||\n\ntu | na pe ||", r"m\.txt:3: line 2, word 1 .*holds 1 syllable,"),
        ("ka mo | ri se |||", r"m\.txt:1: marker '\|\|\|' closes level 3, deeper than"),
        ("ka mo | ri se ||\ntu na | pe", r"m\.txt:2: trailing incomplete group .*line 2"),
        ("ka mo | ri se || ||", r"m\.txt:1: .*marker '\|\|' closes an empty line"),
        ("ka mo | | ri se ||", r"m\.txt:1: .*marker '\|' closes an empty word"),
        ("", r"m\.txt: the material holds no units"),
        ("# only a comment\n\n", r"m\.txt: the material holds no units"),
        ("ka mo ri se", r"m\.txt:1: line 1, word 1 .*holds 4 syllables, needs 2; a '\|' marker"),
    ],
)
def test_parse_errors(h2, text, match):
    with pytest.raises(DesignError, match=match):
        parse_material(text, hierarchy=h2, source="m.txt")


def test_parse_error_names_level_in_depth3(h3):
    text = "a b | c d || e f | g h |||\na b | c d || e f g | h |||\n"
    # second couplet, second line, first word has 3 syllables (calc)
    with pytest.raises(DesignError, match=r"c\.txt:2: couplet 2, line 2, word 1"):
        parse_material(text, hierarchy=h3, source="c.txt")


# --------------------------------------------------------------------------- generation
def test_generate_words_no_repeat_balanced(h2, design_seed):
    words = [["ba", "di"], ["ku", "to"], ["ne", "su"]]
    gen = GenerateSpec(mode="words", words=words)
    groups = generate_material(gen, hierarchy=h2, n_top_groups=25, rng=design_seed)
    assert len(groups) == 25 and all(len(g) == 4 for g in groups)
    stream = [tuple(lab) for g in groups for lab in zip(g[0::2], g[1::2])]
    assert all(a != b for a, b in zip(stream, stream[1:]))  # across group joins too
    counts = Counter(stream)
    assert set(counts) == {tuple(w) for w in words}
    # 50 words over 3 items -> 16 or 17 each (calc)
    assert max(counts.values()) - min(counts.values()) <= 1
    assert sum(counts.values()) == 50  # 25 lines x 2 words (calc)


def test_generate_units_no_adjacent_balanced(h2, design_seed):
    gen = GenerateSpec(mode="units", units=["ba", "di", "ku"])
    groups = generate_material(gen, hierarchy=h2, n_top_groups=10, rng=design_seed)
    flat = [lab for g in groups for lab in g]
    assert len(flat) == 40  # 10 lines x 4 syllables (calc)
    assert all(a != b for a, b in zip(flat, flat[1:]))
    c = Counter(flat)
    assert max(c.values()) - min(c.values()) <= 1  # 40 over 3 -> 13/14 (calc)


def test_generate_one_word_impossible(h2, design_seed):
    gen = GenerateSpec(mode="words", words=[["ba", "di"]])
    with pytest.raises(DesignError, match=r"no_immediate_repeat need at least 2 different words"):
        generate_material(gen, hierarchy=h2, n_top_groups=3, rng=design_seed)
    # without the constraint one word is fine
    gen = GenerateSpec(mode="words", words=[["ba", "di"]], no_immediate_repeat=False)
    assert generate_material(gen, hierarchy=h2, n_top_groups=2, rng=design_seed) == [
        ("ba", "di", "ba", "di")
    ] * 2


def test_generated_design_keeps_stream(tmp_path, design_seed):
    words = [["ba", "di"], ["ku", "to"], ["ne", "su"], ["la", "fi"]]
    r = _recipe(
        tmp_path,
        generate={"mode": "words", "words": words},
        conditions=[{"name": "stream", "kind": "intact"}, {"name": "rand", "kind": "scramble",
                                                          "level": "syllable"}],
    )
    d = make_design(r, _pool(), rng=design_seed)
    for t in d.trials:
        if t.condition == "stream":
            pairs = list(zip(t.labels[0::2], t.labels[1::2]))
            assert all(list(p) in words for p in pairs)
            assert all(a != b for a, b in zip(pairs, pairs[1:]))


# --------------------------------------------------------------------------- tiling
def test_tiling_and_positions(tmp_path, h3, design_seed):
    lines = _material_text(32).splitlines()
    # two lines per couplet: "w | w || w | w |||"
    text = "\n".join(f"{a} {b}|" for a, b in zip(lines[0::2], lines[1::2]))
    r = _recipe(
        tmp_path,
        text=text,
        levels=[{"name": "word", "size": 2}, {"name": "line", "size": 2},
                {"name": "couplet", "size": 2}],
        conditions=[{"name": "intact", "kind": "intact"},
                    {"name": "lines", "kind": "scramble", "level": "line"}],
        trials={"groups_per_trial": 3},
    )
    d = make_design(r, _pool(), rng=design_seed)
    n = r.rates().units_per_trial
    assert n == 8 * 4  # (3 couplets + 1 lead-in) x 8 syllables (calc)
    sizes = {"syllable": 1, "word": 2, "line": 4, "couplet": 8}  # calc from the hierarchy
    parents = {"syllable": 2, "word": 2, "line": 2, "couplet": None}
    for t in d.trials:
        assert len(t.units) == n and t.lead_in_units == 8
        rows = level_units(t, rates=r.rates())
        for level, size in sizes.items():
            lv = [x for x in rows if x.level == level]
            assert len(lv) == n // size
            for x in lv:
                assert x.first_unit == x.index * size and x.n_units == size
                want = x.index % parents[level] + 1 if parents[level] else x.index + 1
                assert x.position == want
                assert x.lead_in == (x.first_unit < 8)
                assert x.label == "-".join(t.labels[x.first_unit : x.first_unit + size])
        # every line of a line-scramble is a line of the material
    mat_lines = {
        tuple(g[i : i + 4]) for g in parse_material(text, hierarchy=h3) for i in (0, 4)
    }
    for t in d.trials:
        got = {t.labels[i : i + 4] for i in range(0, n, 4)}
        assert got <= mat_lines


# --------------------------------------------------------------------------- conditions
def test_scramble_keeps_words_breaks_lines(recipe, h2, design_seed):
    d = make_design(recipe, _pool(), rng=design_seed)
    groups = parse_material(_material_text(40), hierarchy=h2)
    mat_words = {g[i : i + 2] for g in groups for i in (0, 2)}
    mat_lines = set(groups)
    n_lines = same_lines = 0
    for t in d.trials:
        if t.condition != "wrd":
            continue
        words = [t.labels[i : i + 2] for i in range(0, len(t.units), 2)]
        assert all(w in mat_words for w in words)
        for i in range(0, len(t.units), 4):
            n_lines += 1
            same_lines += t.labels[i : i + 4] in mat_lines
    # most regrouped lines are new (common practice for a scramble control)
    assert same_lines < 0.2 * n_lines


def test_unit_scramble_breaks_words(recipe, h2, design_seed):
    d = make_design(recipe, _pool(), rng=design_seed)
    groups = parse_material(_material_text(40), hierarchy=h2)
    mat_words = {g[i : i + 2] for g in groups for i in (0, 2)}
    pairs = [
        t.labels[i : i + 2] for t in d.trials if t.condition == "syl"
        for i in range(0, len(t.units), 2)
    ]
    assert sum(p in mat_words for p in pairs) < 0.3 * len(pairs)  # common practice


def test_intact_and_reverse(recipe, h2, design_seed):
    d = make_design(recipe, _pool(), rng=design_seed)
    groups = parse_material(_material_text(40), hierarchy=h2)
    used = []
    for t in range(1, 7):
        a, b = d.trial("intact", t), d.trial("rev", t)
        assert a.labels == tuple(lab for g in a.source_groups for lab in groups[g])
        assert a.source_groups == b.source_groups
        assert [u.token_id for u in a.units] == [u.token_id for u in b.units]
        assert not any(u.reversed for u in a.units) and all(u.reversed for u in b.units)
        used += a.source_groups
        assert d.trial("syl", t).source_groups == ()
    assert len(used) == len(set(used)) == 36  # 6 trials x 6 lines, 40 available: no reuse (calc)
    assert d.trial("intact", 3).stem == "intact_003"


def test_material_reuse_is_even_and_logged(tmp_path, design_seed, caplog):
    r = _recipe(tmp_path, text=_material_text(8))
    with caplog.at_level(logging.WARNING, logger="stimforge"):
        d = make_design(r, _pool(), rng=design_seed)
    uses = Counter(g for t in d.trials if t.condition == "intact" for g in t.source_groups)
    assert set(uses) == set(range(8))
    # 36 line slots over 8 lines -> 4 or 5 uses each (calc)
    assert set(uses.values()) <= {4, 5}
    assert "holds 8 lines but 6 trials x 6 lines need 36" in caplog.text
    assert any("used 4 or 5 times" in n for n in d.notes)


# --------------------------------------------------------------------------- balance
def test_balance_across_conditions(recipe, design_seed):
    d = make_design(recipe, _pool(), rng=design_seed)
    counts = list(d.label_counts.values())
    assert len(counts) == 4 and all(c == counts[0] for c in counts)
    leads = list(d.lead_in_label_counts.values())
    assert all(c == leads[0] for c in leads)
    # 6 trials x 5 lines x 4 syllables in the analysed part (calc)
    assert sum(counts[0].values()) == 120
    per_cond = {}
    for t in d.trials:
        c = per_cond.setdefault(t.condition, Counter())
        c.update(u.token_id for u in t.units)
    base = per_cond["intact"]
    for c in per_cond.values():
        assert c == base  # the same tokens in every condition
    pool = _pool()
    for lab, toks in pool.items():
        uses = [base.get(tok, 0) for tok in toks]
        if sum(uses):
            assert max(uses) - min(uses) <= 1, lab
    assert sum(d.token_counts.values()) == 4 * 6 * 24  # 4 conditions x 6 trials x 24 units
    report = d.format_balance()
    assert "equal across conditions: yes (analysed part); yes (lead-in)" in report


def test_no_adjacent_identical_labels(tmp_path, design_seed):
    r = _recipe(tmp_path, generate={"mode": "units", "units": ["ba", "di", "ku"]})
    d = make_design(r, _pool(), rng=design_seed)
    for t in d.trials:
        if t.kind == "scramble":
            assert all(a != b for a, b in zip(t.labels, t.labels[1:])), t.stem


def test_tight_but_possible(tmp_path, design_seed):
    # two labels, alternation is the only arrangement (calc): the guard must find it
    r = _recipe(tmp_path, generate={"mode": "units", "units": ["ba", "di"]})
    d = make_design(r, _pool(), rng=design_seed)
    for t in d.trials:
        assert all(a != b for a, b in zip(t.labels, t.labels[1:])), t.stem


@pytest.mark.parametrize(
    "text, conditions, kw, match",
    [
        (
            "ba ba | ba ba ||\n" * 3,
            [{"name": "s", "kind": "scramble", "level": "syllable"}],
            {},
            # 1 trial x 3 lines x 4 syllables, all 'ba'; at most 6 can alternate (calc)
            r"no_adjacent_repeat cannot be met: label 'ba' fills 12 of the 12 syllable slots"
            r".*at most ceil\(12/2\) = 6 per trial",
        ),
        (
            "ba ba | di di ||\n" + "ba ba | ba ba ||\n" * 2,
            [{"name": "s", "kind": "scramble", "level": "word"}],
            {},
            # 5 'ba ba' words, at most ceil(6/2) = 3 can stand apart in 6 slots (calc)
            r"no_adjacent_repeat cannot be met: 5 of the 6 word groups of the trial begin and "
            r"end with 'ba'.*at most ceil\(6/2\) = 3 per trial",
        ),
        (
            "ba ba | di ba ||\nba ba | ba di ||\nba ba | ku to ||\n",
            [{"name": "s", "kind": "scramble", "level": "word"}],
            {},
            # 'ba' ends 4 and starts 4 of 6 words: 4 - 1 trial end > 6 - 4 successors (calc)
            r"no_adjacent_repeat cannot be met: 4 of the 6 word groups end with 'ba' and 4 "
            r"start with it",
        ),
        (
            "ba di | ba di ||\nba di | ba di ||\nba di | di ba ||\n",
            [{"name": "s", "kind": "scramble", "level": "word"}],
            {},
            # 'di ba' can neither follow nor precede 'ba di' (calc); the bounds above pass
            r"an exhaustive search shows that no arrangement satisfies "
            r"constraints.no_adjacent_repeat; 6 word groups",
        ),
        (
            "ba di | ku to ||\n" * 3,
            [{"name": "i", "kind": "intact"}, {"name": "r", "kind": "reverse"}],
            {"constraints": {"max_uses_per_token": 5}},
            # 'ba' 3 uses per condition x 2 over 1 token = 6 > 5; 2 uses per condition allowed
            # -> ceil(3/2) = 2 tokens (calc)
            r"(?s)max_uses_per_token = 5 cannot be met.*'ba': 3 uses per condition x 2 "
            r"condition\(s\) over 1 token\(s\) -> 6 uses of some token; needs >= 2 tokens",
        ),
    ],
)
def test_impossible_constraints(tmp_path, design_seed, text, conditions, kw, match):
    r = _recipe(
        tmp_path,
        text=text,
        conditions=conditions,
        trials={"groups_per_trial": 3, "per_condition": 1, "lead_in": False},
        **kw,
    )
    with pytest.raises(DesignError, match=match):
        make_design(r, _pool(n=1), rng=design_seed)


def test_missing_labels_all_listed(tmp_path, design_seed):
    text = "ka mo | zu xo ||\nri se | tu qa ||\nzu zu | pe lo ||\n"
    r = _recipe(tmp_path, text=text, trials={"groups_per_trial": 3, "per_condition": 1})
    with pytest.raises(DesignError) as exc:
        make_design(r, _pool(), rng=design_seed)
    msg = str(exc.value)
    assert "3 labels in the material have no token" in msg
    # sorted, with counts and first place (read off the text, calc)
    assert msg.index("'qa'") < msg.index("'xo'") < msg.index("'zu'")
    assert "'zu': 3 uses, first at " in msg and "material.txt:1" in msg
    assert "'qa': 1 use, first at " in msg and "material.txt:2" in msg


# --------------------------------------------------------------------------- repeats, lists
@pytest.mark.parametrize("placement", ["adjacent", "spaced"])
def test_repeats(tmp_path, design_seed, placement):
    r = _recipe(
        tmp_path,
        text=_material_text(40),
        repeat={"conditions": ["intact", "syl"], "placement": placement, "times": 2},
        trials={"lists": 2},
    )
    d = make_design(r, _pool(), rng=design_seed)
    for li in (1, 2):
        pres = d.list_presentations(li)
        assert [p.order for p in pres] == list(range(1, len(pres) + 1))
        # 2 repeated conditions x 6 x 3 + 2 others x 6 (calc)
        assert len(pres) == 2 * 6 * 3 + 2 * 6
        seen = Counter((p.condition, p.trial) for p in pres)
        for (c, t), n in seen.items():
            assert n == (3 if c in ("intact", "syl") else 1)
        for c in ("intact", "syl"):
            for t in range(1, 7):
                idx = [i for i, p in enumerate(pres) if (p.condition, p.trial) == (c, t)]
                assert [pres[i].repetition for i in idx] == [1, 2, 3]
                gaps = [b - a - 1 for a, b in zip(idx, idx[1:])]
                if placement == "adjacent":
                    assert gaps == [0, 0]
                else:
                    assert min(gaps) >= 2  # >= 2 other trials between hearings (the design rule)
    # a repetition is the same plan: one TrialPlan per (condition, trial)
    keys = [(t.condition, t.trial) for t in d.trials]
    assert len(keys) == len(set(keys)) == 24


def test_williams_square_even():
    rows = williams_rows(4)
    # Latin square + each ordered pair adjacent exactly once (Williams 1949, Aust J Sci Res A2)
    for pos in range(4):
        assert sorted(r[pos] for r in rows) == [0, 1, 2, 3]
    pairs = Counter((a, b) for r in rows for a, b in zip(r, r[1:]))
    assert len(pairs) == 12 and set(pairs.values()) == {1}


def test_williams_square_odd():
    rows = williams_rows(3)
    assert len(rows) == 6
    for pos in range(3):
        assert sorted(r[pos] for r in rows[:3]) == [0, 1, 2]
    # odd n: square + mirror gives every ordered pair twice (Williams 1949)
    pairs = Counter((a, b) for r in rows for a, b in zip(r, r[1:]))
    assert len(pairs) == 6 and set(pairs.values()) == {2}


def test_lists_latin_square_and_stable(tmp_path, design_seed):
    r4 = _recipe(tmp_path, text=_material_text(40), trials={"lists": 4})
    d4 = make_design(r4, _pool(), rng=design_seed)
    orders = [d4.block_order(i) for i in range(1, 5)]
    for pos in range(4):
        assert sorted(o[pos] for o in orders) == sorted(["intact", "syl", "wrd", "rev"])
    assert all(sorted(o) == sorted(orders[0]) for o in orders)
    # within-block orders differ between lists (seeded per list)
    blocks = [[p.trial for p in d4.list_presentations(i) if p.condition == "intact"]
              for i in range(1, 5)]
    assert len({tuple(b) for b in blocks}) > 1
    # adding a list changes neither the trial contents nor the earlier lists
    r5 = _recipe(tmp_path, text=_material_text(40), trials={"lists": 5})
    d5 = make_design(r5, _pool(), rng=design_seed)
    assert d5.trials == d4.trials
    assert [p for p in d5.presentations if p.list <= 4] == list(d4.presentations)


def test_lists_with_rotating_items(tmp_path, design_seed):
    """Latin square where items rotate: each list holds every trial number once, in one
    condition; over C lists every (condition, trial) is played exactly once (common practice)."""
    r = _recipe(tmp_path, text=_material_text(40), trials={"lists": 4, "rotate_items": True})
    d = make_design(r, _pool(), rng=design_seed)
    n_trials = r.trials.per_condition
    seen = []
    for li in range(1, 5):
        pres = [p for p in d.list_presentations(li) if p.repetition == 1]
        assert sorted(p.trial for p in pres) == list(range(1, n_trials + 1))
        # trial t sits in condition (t - 1 + l - 1) mod C of the recipe's order
        names = [c.name for c in r.conditions]
        assert all(names.index(p.condition) == (p.trial - 1 + li - 1) % 4 for p in pres)
        seen += [(p.condition, p.trial) for p in pres]
    assert sorted(seen) == sorted({(p.condition, p.trial) for p in d.trials})
    assert len(seen) == len(set(seen))
    assert "items rotate" in d.seed_info["list_design"]


# --------------------------------------------------------------------------- determinism
def test_determinism(recipe, design_seed):
    a = make_design(recipe, _pool(), rng=design_seed)
    b = make_design(recipe, _pool(), rng=design_seed)
    assert isinstance(a, Design) and a == b and a.to_dict() == b.to_dict()
    assert json.loads(json.dumps(a.to_dict())) == a.to_dict()
    c = make_design(recipe, _pool(), rng=design_seed + 1)
    assert c.trials != a.trials
    # default seed is the recipe's; a Generator is accepted
    assert make_design(recipe, _pool()).seed_info["seed"] == recipe.seed
    g = make_design(recipe, _pool(), rng=np.random.default_rng(design_seed))
    assert len(g.trials) == len(a.trials)


def test_pool_order_does_not_matter(recipe, design_seed):
    pool = _pool()
    rev = {lab: list(reversed(toks)) for lab, toks in reversed(list(pool.items()))}
    assert make_design(recipe, pool, rng=design_seed) == make_design(recipe, rev, rng=design_seed)


def test_given_material_checked(recipe, design_seed):
    with pytest.raises(DesignError, match=r"material group 2: 3 units, a line needs 4"):
        make_design(recipe, _pool(), rng=design_seed, material=[("ka",) * 4, ("ka",) * 3])
