"""The shipped cost recipe through `tinyrnnt experiment --recipe cost` on a tiny corpus: every method
timed at every list size, peak memory, the tables and plot in the run folder, and the report shows them."""

import csv
import json
import subprocess
import sys
from pathlib import Path

import pytest

from test_cli import TINY  # the same tiny corpus settings as the CLI tests
from tinyrnnt.config import ConfigError
from tinyrnnt.lab.cost import METHODS
from tinyrnnt.lab.recipes import read_recipe, split_overrides
from tinyrnnt.synth.corpus import CorpusConfig, build_corpus

ROOT = Path(__file__).resolve().parents[1]
SMALL = ["model.encoder_dim=32", "model.predictor_dim=32", "model.predictor_embed=16", "model.joiner_dim=24",
         "model.encoder_layers=2", "train.steps=2", "train.minutes=0", "train.threads=1", "data.batch_size=8",
         "data.valid_subset=16", "train.validate_every_steps=2", "train.warmup_steps=1"]


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    folder = tmp_path_factory.mktemp("cost") / "corpus"
    build_corpus(CorpusConfig(seed=8, **TINY), folder, quiet=True)
    return folder


def test_the_cost_recipe_measures_every_method_and_the_report_shows_it(corpus, tmp_path):
    sets = SMALL + [f"data.corpus={corpus}", f"out_dir={tmp_path / 'runs'}", "cost.sizes=[5,40]",
                    "cost.train_batch=2", "cost.utterances=3", "cost.train_repeats=1", "evaluate.limit=6"]
    done = subprocess.run([sys.executable, "-m", "tinyrnnt", "experiment", "--recipe", "cost", *sets],
                          cwd=ROOT, capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-3000:]
    folder = tmp_path / "runs" / "cost"
    costs = json.loads((folder / "cost" / "cost.json").read_text())
    assert costs["settings"]["sizes"] == [5, 40] and costs["settings"]["threads"] == 1
    for key in ("decode_ms_per_utt", "train_step_ms"):  # every method at every size, a measured time
        assert set(costs[key]) == set(METHODS)
        assert all(row.keys() == {"5", "40"} and all(v > 0 for v in row.values()) for row in costs[key].values())
    for method, mem in costs["peak_memory_mb"].items():  # the peak holds the loaded model
        assert mem["peak"] > 0 and mem["above_loaded"] >= 0 and mem["at_list_size"] == 40, method
    with open(folder / "cost" / "cost_decode_ms.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    assert [r["list_size"] for r in rows] == ["5", "40"]
    assert all(float(r[m]) == costs["decode_ms_per_utt"][m][r["list_size"]] for r in rows for m in METHODS)
    assert (folder / "cost" / "cost.png").stat().st_size > 0 and (folder / "cost" / "cost.md").is_file()
    # the report (rendered by the experiment) lists the cost tables and plots them against N
    page = (folder / "report" / "report.html").read_text()
    assert "cost_decode_ms.csv" in page and "cost_peak_memory_mb.csv" in page
    assert (folder / "report" / "cost_decode_ms.png").is_file() and (folder / "report" / "cost_train_step_ms.png").is_file()
    assert "No cost tables" not in page


def test_a_cost_recipe_names_what_is_wrong(tmp_path):
    recipe = read_recipe("cost")
    assert recipe.cost.sizes == (10, 100, 1000)
    with pytest.raises(ConfigError, match="cost.sizes"):
        split_overrides(recipe, ["cost.sizes=[0,10]"])
    with pytest.raises(ConfigError, match="cost.train_batch"):
        split_overrides(recipe, ["cost.utterances=2", "cost.train_batch=4"])
    bad = tmp_path / "bad.yaml"
    bad.write_text("runs: {baseline: {}, trie: {bias: {kind: trie}, train: {steps: 5}}}\ncost: {sizes: [10]}\n")
    with pytest.raises(ConfigError, match=r"missing \['attention', 'trie_attention'\]"):
        read_recipe(bad)


@pytest.mark.skipif(not Path("/proc/self/status").is_file(), reason="needs Linux's /proc (VmHWM)")
def test_a_spawned_measuring_process_reports_its_own_peak_not_its_parents():
    # Source: proc(5), VmHWM is the peak resident size of the process's own address space, which
    # execve replaces; getrusage(2) keeps ru_maxrss across fork and execve (from memory), the trap
    # that once gave every method of the cost benchmark its large parent's peak. The parent here
    # holds 400 MB of touched pages while a fresh interpreter reports its own peak (11 MB here).
    import numpy as np

    from tinyrnnt.runtime import peak_rss_mb

    held = np.ones(400 * 2 ** 20 // 8)  # 400 MB, every page written
    parent = peak_rss_mb()
    out = subprocess.run([sys.executable, "-c", "from tinyrnnt.runtime import peak_rss_mb; print(peak_rss_mb())"],
                         capture_output=True, text=True, check=True)
    child = float(out.stdout)
    assert held.sum() > 0 and parent > 400
    assert 5 < child < parent - 300
