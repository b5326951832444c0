"""Grids: every cell run once, models shared between cells that differ only in decoding, finished
cells kept on restart (after a kill too), one JSON Lines file, comparisons with their reference cell."""

import json
import math
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from test_cli import TINY  # the same tiny corpus settings as the CLI tests
from tinyrnnt.config import ConfigError
from tinyrnnt.lab.grid import read_lines, run_grid
from tinyrnnt.lab.recipes import read_recipe, run_recipe, split_overrides
from tinyrnnt.lab.report import make_report
from tinyrnnt.synth.corpus import CorpusConfig, build_corpus

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    folder = tmp_path_factory.mktemp("grid") / "corpus"
    build_corpus(CorpusConfig(seed=6, **TINY), folder, quiet=True)
    return folder


def _recipe(tmp_path, corpus, name="tiny_grid", splits="[test_unseen]"):
    path = tmp_path / f"{name}.yaml"
    path.write_text(f"""# A tiny grid: biasing input x list size x shallow fusion, all from one baseline.
name: {name}
out_dir: {tmp_path / 'runs'}
shared:
  data: {{corpus: {corpus}, batch_size: 8, valid_subset: 16}}
  model: {{encoder_dim: 32, predictor_dim: 32, predictor_embed: 16, joiner_dim: 24, encoder_layers: 2}}
  train: {{steps: 4, minutes: 0, validate_every_steps: 2, threads: 1, snapshot_minutes: 0}}
runs:
  baseline: {{}}
grid:
  start_from: baseline
  splits: {splits}
  compare: {{biasing: none}}
  axes:
    biasing:
      none: {{}}
      trie: {{bias: {{kind: trie, cue_dim: 8}}, train: {{steps: 3}}}}
    list_size: [0, 10]
    fusion:
      plain: {{}}
      boosted: {{decode: {{search: beam, beam: 2, boost_weight: 2}}}}
""")
    return path


def test_a_grid_runs_every_cell_once_and_a_second_run_recomputes_nothing(corpus, tmp_path):
    path = _recipe(tmp_path, corpus)
    recipe = read_recipe(path)
    first = run_grid(recipe, quiet=True)
    assert (first["evaluated"], first["kept"], first["trained"]) == (8, 0, 2)  # two models for eight cells
    folder = tmp_path / "runs" / "tiny_grid"
    lines = read_lines(folder / "grid.jsonl")
    assert sorted(g["cell"] for g in lines) == sorted(
        f"biasing={b},list_size={n},fusion={f}" for b in ("none", "trie") for n in (0, 10)
        for f in ("plain", "boosted"))
    # cells that differ only in decoding share one model; both models fine-tune the baseline
    assert {g["model"] for g in lines} == {"biasing=none", "biasing=trie"}
    assert len({g["checkpoint"] for g in lines}) == 2
    assert all(g["steps"] == 4 + g["model_config"]["train"]["steps"] for g in lines)
    assert {g["decode"]["search"] for g in lines if g["fusion"] == "boosted"} == {"beam"}
    assert all(g["model_config"]["bias"]["kind"] == ("trie" if g["biasing"] == "trie" else "none") for g in lines)
    cmp = json.loads((folder / "grid_comparisons.json").read_text())
    assert {(c["cell"].split(",")[0], c["against"].split(",")[0]) for c in cmp} == {("biasing=trie", "biasing=none")}
    assert len(cmp) == 4 * 3 and all("interval" in c["verdict"] or "no rate" in c["verdict"] for c in cmp)
    made = make_report(folder)  # the report reads a grid folder too: a system is a cell but its list size
    head = made["headline"]
    assert {(h["system"], h["against"]) for h in head} == {
        ("biasing=trie, fusion=plain", "biasing=none, fusion=plain"),
        ("biasing=trie, fusion=boosted", "biasing=none, fusion=boosted")}
    assert {h["list_size"] for h in head} == {10} and (folder / "report" / "rates.grid.test_unseen.png").is_file()
    assert "reference cell" in made["html"].read_text()
    before = (folder / "grid.jsonl").read_bytes()
    again = run_grid(recipe, quiet=True)
    assert (again["evaluated"], again["kept"], again["trained"]) == (0, 8, 0)
    assert (folder / "grid.jsonl").read_bytes() == before
    # a new axis value adds only its own cells; the rest are kept
    more = run_recipe(path, overrides=["grid.splits=[test_unseen, test]"], quiet=True)
    assert len(more) == 16 and len(read_lines(folder / "grid.jsonl")) == 16
    # a cell whose decoding changed under the same label is computed again; its model is kept
    changed, _ = split_overrides(recipe, ["grid.splits=[test_unseen, test]",
                                          "grid.axes.fusion.boosted.decode.boost_weight=3"])
    redo = run_grid(changed, quiet=True)
    assert (redo["evaluated"], redo["kept"], redo["trained"]) == (8, 8, 0)
    lines = {(g["cell"], g["split"]): g for g in read_lines(folder / "grid.jsonl")}
    assert {g["boost_weight"] for g in lines.values() if g["fusion"] == "boosted"} == {3.0}


def test_a_grid_killed_midway_loses_nothing_and_recomputes_nothing(corpus, tmp_path):
    path = _recipe(tmp_path, corpus, name="killed")
    lines_path = tmp_path / "runs" / "killed" / "grid.jsonl"
    proc = subprocess.Popen([sys.executable, "-m", "tinyrnnt", "experiment", "--recipe", str(path), "--quiet"],
                            cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 240
    while time.monotonic() < deadline and proc.poll() is None:
        if lines_path.is_file() and lines_path.read_text().count("\n") >= 1:
            break
        time.sleep(0.02)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    kept = read_lines(lines_path)
    assert 1 <= len(kept) < 8, "the grid finished before it could be killed; the kill was not exercised"
    before = lines_path.read_bytes()
    rest = run_grid(read_recipe(path), quiet=True)
    assert rest["kept"] == len(kept) and rest["evaluated"] == 8 - len(kept)
    assert rest["trained"] <= 1  # the model of the finished cells is kept, not trained again
    after = read_lines(lines_path)
    assert lines_path.read_bytes().startswith(before) and len(after) == 8
    assert len({g["cell"] for g in after}) == 8


def test_a_torn_last_line_is_dropped_and_bad_grids_are_named(corpus, tmp_path):
    path = tmp_path / "g.jsonl"
    path.write_text('{"cell": "a", "split": "test"}\n{"cell": "b", "spl')
    assert [g["cell"] for g in read_lines(path)] == ["a"] and path.read_text().endswith("}\n")
    path.write_text('{"cell": "a"}\nnot json\n{"cell": "c"}\n')
    with pytest.raises(ConfigError, match="g.jsonl:2"):
        read_lines(path)
    recipe = _recipe(tmp_path, corpus).read_text()
    bad = tmp_path / "bad.yaml"
    bad.write_text(recipe.replace("list_size: [0, 10]", "list_size: [ten]"))
    with pytest.raises(ConfigError, match="grid.axes.list_size"):
        read_recipe(bad)
    bad.write_text(recipe.replace("compare: {biasing: none}", "compare: {biasing: nothing}"))
    with pytest.raises(ConfigError, match="grid.compare.biasing"):
        read_recipe(bad)
    bad.write_text(recipe.replace("boost_weight: 2", "boost_weight: 2, colour: red"))
    with pytest.raises(ConfigError, match="colour"):
        run_grid(read_recipe(bad), quiet=True)
    bad.write_text(recipe.replace("plain:", "off:"))
    with pytest.raises(ConfigError, match="quote it"):
        read_recipe(bad)
    bad.write_text(recipe.replace("plain:", "'plain fusion':"))
    with pytest.raises(ConfigError, match="only letters"):
        read_recipe(bad)
    for axis in ("biasing", "fusion"):  # an axis name that would clash with a result key, first or last
        bad.write_text(recipe.replace(f"    {axis}:", "    wer:").replace(f"compare: {{{axis}: ", "compare: {wer: "))
        with pytest.raises(ConfigError, match="axis name 'wer'"):
            read_recipe(bad)
    bad.write_text(recipe.replace("axes:", "rows: 1\n  axes:"))
    with pytest.raises(ConfigError, match="unknown key 'rows'"):
        read_recipe(bad)


@pytest.mark.parametrize("name", sorted(p.stem for p in (Path(__file__).parents[1] / "tinyrnnt" / "recipes").glob("*.yaml")))
def test_shipped_recipes_read_and_expand(name):
    from tinyrnnt.lab.grid import GridPlan, expand
    from tinyrnnt.lab.recipes import expand_arms
    from tinyrnnt.config import from_dict

    recipe = read_recipe(name)
    assert recipe.name == name
    if recipe.grid:
        plan = from_dict(GridPlan, recipe.grid, "grid")
        cells, models = expand(recipe, plan)
        assert len(cells) == math.prod(len(labels) for labels in plan.axes.values())  # every combination
        assert len(models) == len(plan.axes["biasing"]) * len(plan.axes.get("seed", [0]))  # decoding shares models
        assert plan.compare and all(c.labels for c in cells)
    else:
        arms = expand_arms(recipe)
        assert "baseline" in arms
        controls = [a for k, a in arms.items() if k.endswith("_control")]
        for arm in arms.values():  # every biased arm has an equal-steps control from the same start
            if arm.cfg.bias.kind != "none":
                assert any(c.cfg.train.steps == arm.cfg.train.steps and c.source == arm.source for c in controls)


def test_a_grid_without_runs_over_seeds_trains_from_nothing_and_reports_the_spread(corpus, tmp_path):
    path = tmp_path / "seeds.yaml"
    path.write_text(f"""name: seeds
out_dir: {tmp_path / 'runs'}
shared:
  data: {{corpus: {corpus}, batch_size: 8, valid_subset: 16}}
  model: {{encoder_dim: 32, predictor_dim: 32, predictor_embed: 16, joiner_dim: 24, encoder_layers: 2}}
  train: {{steps: 3, minutes: 0, validate_every_steps: 3, threads: 1, snapshot_minutes: 0}}
grid:
  compare: {{biasing: none}}
  axes:
    biasing: {{none: {{}}, trie: {{bias: {{kind: trie, cue_dim: 8}}}}}}
    seed: [0, 1]
    list_size: [10]
""")
    rows = run_recipe(path, quiet=True)
    folder = tmp_path / "runs" / "seeds"
    lines = read_lines(folder / "grid.jsonl")
    assert len(rows) == len(lines) == 4 and {g["model_config"]["train"]["seed"] for g in lines} == {0, 1}
    assert all(g["steps"] == 3 and g["model_config"]["train"]["init_from"] == "" for g in lines)
    page = (folder / "report" / "report.html").read_text()
    assert "over 2 training seeds" in page and "No spread over seeds" not in page
