"""The package's shape: one-way imports, a cheap top level, one source for shared defaults,
and a demo build whose bytes do not change when only the structure does."""

from __future__ import annotations

import ast
import inspect
import subprocess
import sys
from pathlib import Path

import pytest

import stimforge
from stimforge import defaults

ROOT = Path(__file__).resolve().parents[1]
PKG = ROOT / "stimforge"

#: Every module of the package in the order data flows through it.  A module may import only
#: modules listed before it (commands/ may import anything).  A new module must be placed here.
STAGES = [
    "_version", "defaults", "errors", "timing",
    "grid", "stats", "audio_io", "acoustics", "envelopes", "verify_stats", "events",
    "recipe", "cache", "tts", "corpus", "prosody", "retime", "design", "assemble",
    "export", "verify_contrast", "verify_fit", "verify_report", "verify", "build_report", "build",
    "preflight", "epochs", "simulate", "response", "response_report", "planner",
    "cli", "__init__", "__main__",
]


def _relative_imports(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    deps: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.level == 1:
            if node.module:
                deps.add(node.module.split(".")[0])
            else:
                deps.update(a.name for a in node.names)
    return deps


def test_every_module_is_placed_in_the_stage_order():
    mods = {p.stem for p in PKG.glob("*.py")}
    assert mods <= set(STAGES), f"place these in STAGES: {sorted(mods - set(STAGES))}"


@pytest.mark.parametrize("module", [m for m in STAGES if (PKG / f"{m}.py").is_file()])
def test_no_module_imports_a_later_stage(module):
    deps = _relative_imports(PKG / f"{module}.py") - {"commands"}
    later = {d for d in deps if d in STAGES and STAGES.index(d) >= STAGES.index(module)}
    assert not later, f"stimforge/{module}.py imports later stage(s) {sorted(later)}"


def _modules_after(code: str) -> set[str]:
    out = subprocess.run([sys.executable, "-c", code + "\nimport sys; print(' '.join(sys.modules))"],
                         capture_output=True, text=True, check=True, cwd=ROOT)
    return set(out.stdout.split())


def test_statistics_load_without_pydantic_or_the_audio_stack():
    loaded = _modules_after("import stimforge.verify_stats, stimforge.stats, stimforge.grid")
    assert "pydantic" not in loaded and "yaml" not in loaded
    assert "soundfile" not in loaded and "pyworld" not in loaded


def test_top_level_is_lazy_but_complete():
    loaded = _modules_after("import stimforge")
    assert "stimforge.recipe" not in loaded and "pydantic" not in loaded and "scipy" not in loaded
    for name in ("build", "check", "load_recipe", "read_build", "RateTable", "BuildResult",
                 "epoch_recording", "analyze", "load_epochs", "plan_power"):
        assert callable(getattr(stimforge, name)), name
    assert stimforge.check is stimforge.verify.check
    with pytest.raises(AttributeError, match="no attribute 'nonesuch'"):
        stimforge.nonesuch  # noqa: B018


def _default(func, name):
    return inspect.signature(func).parameters[name].default


def test_shared_defaults_have_one_source():
    from stimforge import verify
    from stimforge.cli import build_parser
    from stimforge.recipe import CheckSpec, RetimeSpec, TrimSpec

    assert CheckSpec().alpha == defaults.ALPHA
    assert _default(verify.check_build, "alpha") == defaults.ALPHA
    assert _default(verify.check_files, "alpha") == defaults.ALPHA
    assert _default(verify.check, "alpha") == defaults.ALPHA
    args = build_parser().parse_args(["check", "x"])
    assert args.alpha == defaults.ALPHA
    assert RetimeSpec().onset_threshold_db == defaults.ONSET_THRESHOLD_DB
    assert TrimSpec().threshold_db == defaults.TRIM_THRESHOLD_DB
    import importlib

    limits = [m.le for m in RetimeSpec.model_fields["jobs"].metadata if hasattr(m, "le")]
    assert limits == [defaults.MAX_JOBS]
    for module in ("stimforge.build", "stimforge.verify"):
        assert importlib.import_module(module).MAX_JOBS == defaults.MAX_JOBS
    ref = CheckSpec().reference
    assert verify.REFERENCE_CUES == {"level_step": ref.level_step_db, "gap": ref.gap_ms,
                                     "pitch_step": ref.pitch_step_st}
    assert verify.REFERENCE_CUES == {"level_step": defaults.REFERENCE_LEVEL_STEP_DB,
                                     "gap": defaults.REFERENCE_GAP_MS,
                                     "pitch_step": defaults.REFERENCE_PITCH_STEP_ST}


def test_rate_table_round_trips_through_the_manifest_layout():
    from stimforge.grid import RateTable, grid_from_numbers

    t = grid_from_numbers(unit_duration=0.32, levels=[("word", 2), ("phrase", 2), ("sentence", 2)],
                          sr=44100, n_top_groups=6, unit_name="syllable", lead_in=True)
    assert RateTable.from_dict(t.to_dict()) == t
    # 0.32 s units: sentence 2.56 s -> 0.390625 Hz; 6 sentences = 15.36 s -> bins 6, 12, 24, 48
    # for sentence, phrase, word, syllable [calc]
    assert [r.bin for r in t.rows] == [48, 24, 12, 6]
    assert t.rows[-1].rate == pytest.approx(0.390625)
