"""The notebook experience: the walkthrough runs top to bottom with every figure shown after a
build, and the result object it uses (DataFrames, Figures, a player that links the file,
``stimforge.read_build`` returning the same object as ``build``)."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import stimforge

ROOT = Path(__file__).resolve().parents[1]
WALKTHROUGH = ["walkthrough.ipynb", "phrase_sentence_4hz.yaml", "phrase_sentence_4hz.txt"]


def _copy_recipes(tmp: Path) -> Path:
    """The walkthrough and its recipe in tmp/recipes, the demo corpus where they expect it."""
    (tmp / "recipes").mkdir()
    for name in WALKTHROUGH:
        shutil.copy(ROOT / "recipes" / name, tmp / "recipes" / name)
    (tmp / "demo_corpus").symlink_to(ROOT / "demo_corpus", target_is_directory=True)
    return tmp / "recipes"


def _outputs(nb) -> list:
    return [o for c in nb.cells if c.cell_type == "code" for o in c.get("outputs", [])]


@pytest.mark.slow
def test_walkthrough_notebook_runs_with_its_figures_shown(tmp_path, monkeypatch):
    nbformat = pytest.importorskip("nbformat")
    nbclient = pytest.importorskip("nbclient")
    # the kernel's own (inline) backend, as in Jupyter; CI exports MPLBACKEND=Agg otherwise
    monkeypatch.delenv("MPLBACKEND", raising=False)
    folder = _copy_recipes(tmp_path)
    path = folder / "walkthrough.ipynb"
    nb = nbformat.read(path, as_version=4)
    for c in nb.cells:
        if c.cell_type == "code":
            c.outputs = []
    client = nbclient.NotebookClient(nb, timeout=900, kernel_name="python3",
                                     resources={"metadata": {"path": str(folder)}})
    client.execute()
    outputs = _outputs(nb)
    assert not [o for o in outputs if o.get("output_type") == "error"]
    stderr = "".join(o.get("text", "") for o in outputs if o.get("name") == "stderr")
    assert "IProgress" not in stderr and "Warning:" not in stderr, stderr
    stdout = "".join(o.get("text", "") for o in outputs if o.get("name") == "stdout")
    assert "sentence" in stdout and "same trials: True" in stdout, stdout
    code = [c for c in nb.cells if c.cell_type == "code"]
    build_at = next(i for i, c in enumerate(code) if "stimforge.build(" in c.source)
    pngs = [i for i, c in enumerate(code) for o in c.outputs if "image/png" in o.get("data", {})]
    # plot_spectrum, check.plot() and a pyplot figure, all after the build
    assert len(pngs) >= 3 and all(i > build_at for i in pngs), pngs
    html = [o["data"]["text/html"] for o in code[build_at].outputs
            if "text/html" in o.get("data", {})]
    assert html and "<audio" in html[0] and "base64" not in html[0]
    assert "src='build/phrase-sentence-4hz/stimuli/" in html[0]
    assert (folder / "build" / "phrase-sentence-4hz" / "check" / "processing.html").is_file()
    tables = [o["data"]["text/html"] for o in outputs if "text/html" in o.get("data", {})
              and "dataframe" in o["data"]["text/html"]]
    assert len(tables) >= 3  # trials, units and tokens as DataFrames


def test_stored_walkthrough_was_executed_with_its_outputs():
    nb = json.loads((ROOT / "recipes" / "walkthrough.ipynb").read_text(encoding="utf-8"))
    code = [c for c in nb["cells"] if c["cell_type"] == "code"]
    assert all(c.get("execution_count") for c in code)
    outs = [o for c in code for o in c.get("outputs", [])]
    assert not [o for o in outs if o.get("output_type") == "error"]
    assert sum("image/png" in o.get("data", {}) for o in outs) >= 3
    text = json.dumps(outs)
    # no machine path and no hidden temporary build folder in what the reader sees
    for bad in ("/work/", "/tmp/", "/home/", ".partial-"):
        assert bad not in text, bad


# --------------------------------------------------------------------------- the result object
@pytest.fixture(scope="module")
def built(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("nb")
    folder = _copy_recipes(tmp)
    return stimforge.build(folder / "phrase_sentence_4hz.yaml", out=tmp / "set", progress=False)


def _raw_backend():
    import matplotlib

    return dict.__getitem__(matplotlib.rcParams, "backend")  # without resolving it


@pytest.mark.slow
def test_build_result_tables_figures_and_player(built):
    pd = pytest.importorskip("pandas")
    from matplotlib.figure import Figure

    from stimforge.build import TRIAL_COLUMNS, UNIT_COLUMNS

    res = built
    assert isinstance(res.trials, pd.DataFrame) and list(res.trials.columns) == TRIAL_COLUMNS
    assert len(res.trials) == len(res.trial_rows)
    assert isinstance(res.units, pd.DataFrame) and list(res.units.columns) == UNIT_COLUMNS
    tok = res.tokens
    lo, hi = res.recipe.retime.stretch_range  # every factor obeys the recipe's range
    assert tok["stretch_factor"].between(lo, hi).all()
    assert {"f0_before_hz", "f0_after_hz", "rms_before_dbfs", "rms_after_dbfs", "flags",
            "uses"} <= set(tok.columns)
    before = _raw_backend()
    fig = res.plot_spectrum(trial=1, condition="sentences")
    assert isinstance(fig, Figure) and _raw_backend() == before  # no backend switch
    s = res.spectrum(trial=1, condition="sentences")
    k = int(round(4.0 * s["window"]))  # the syllable rate, 4 Hz, on bin 40 of a 10 s window
    # a syllable stream's envelope peaks at its rate, far above its neighbours (common
    # practice: the unit-rate peak the checker also requires)
    assert s["db_re_neighbours"][k] > 10.0
    assert np.argmax(s["amplitude"][1:]) + 1 == k
    for what in ("spectra", "positions", "joins"):
        assert isinstance(res.check.plot(what), Figure)
    page = res._repr_html_()
    assert "<audio" in page and "base64" not in page and len(page) < 6000
    assert page.count("acoustic check:") == 1  # the verdict once, not repeated
    src = page.split("src='")[1].split("'")[0]
    assert src.startswith("file://") or (Path.cwd() / src).is_file()
    assert "sentences_001.wav" in page  # the first trial of the first condition
    assert "listen first to: stimuli/sentences_001.wav" in res.summary


@pytest.mark.slow
def test_read_build_returns_the_same_result_object(built):
    from stimforge.build import BuildResult
    from stimforge.errors import CheckInputError

    again = stimforge.read_build(built.out)
    assert type(again) is BuildResult is type(built)
    assert again.trial_rows == built.trial_rows and again.unit_rows == built.unit_rows
    assert again.manifest == built.manifest and again.recipe.name == built.recipe.name
    assert again.check.verdict == built.check.verdict
    assert again.check.to_dict() == built.check.to_dict()
    with pytest.raises(CheckInputError, match="check.json"):
        again.check.plot()
    # the check was measured in a hidden temporary folder: the report names the real one
    assert built.check.location == str(built.out)
    assert ".partial" not in built.check.format_text() and ".partial" not in repr(built)


def test_stimforge_build_is_the_function_whatever_was_imported_first():
    code = ("import stimforge.build, stimforge.audio_io\nimport stimforge\n"
            "print(callable(stimforge.build), stimforge.read_build.__name__)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, cwd=ROOT).stdout.split()
    assert out == ["True", "open_build"]


def test_tables_without_pandas_name_the_fix(monkeypatch, tmp_path):
    from stimforge.build import BuildResult
    from stimforge.errors import BuildError

    monkeypatch.setitem(sys.modules, "pandas", None)  # as if it were not installed
    res = BuildResult(out=tmp_path, recipe=None, trial_rows=[], unit_rows=[],
                      manifest={"rate_table": {}})
    with pytest.raises(BuildError, match=r"needs pandas: pip install 'stimforge\[notebook\]'"):
        res.trials  # noqa: B018
