"""Grid cells evaluated side by side (recipe `parallel: 2`): the same result lines as the serial run
but for timing, each boost weight tuned once per model, only the parent writes grid.jsonl, and SIGTERM
stops the workers."""

import json
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest

from test_cli import TINY, children, stop_with_sigterm  # the CLI tests' tiny corpus and /proc helpers
from tinyrnnt.lab.grid import read_lines, run_grid
from tinyrnnt.lab.recipes import read_recipe
from tinyrnnt.synth.corpus import CorpusConfig, build_corpus

ROOT = Path(__file__).resolve().parents[1]
TIMING = ("decode_seconds",)  # the only fields allowed to differ between a serial and a parallel run


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    folder = tmp_path_factory.mktemp("gridpar") / "corpus"
    build_corpus(CorpusConfig(seed=7, **TINY), folder, quiet=True)
    return folder


def _recipe(tmp_path, corpus, parallel, name="par", splits="[test_unseen]", steps=4):
    path = tmp_path / f"{name}{parallel}.yaml"
    path.write_text(f"""# A tiny grid: biasing input x list size x decoding (one with a tuned boost weight).
name: {name}
out_dir: {tmp_path / 'runs'}
parallel: {parallel}
shared:
  data: {{corpus: {corpus}, batch_size: 8, valid_subset: 16}}
  model: {{encoder_dim: 32, predictor_dim: 32, predictor_embed: 16, joiner_dim: 24, encoder_layers: 2}}
  train: {{steps: {steps}, minutes: 0, validate_every_steps: 2, threads: 1, snapshot_minutes: 0}}
evaluate: {{tune: {{list_size: 10, weights: [0, 1, 3]}}}}
grid:
  splits: {splits}
  compare: {{biasing: none}}
  axes:
    biasing:
      none: {{}}
      trie: {{bias: {{kind: trie, cue_dim: 8}}}}
    list_size: [0, 10]
    fusion:
      plain: {{}}
      boosted: {{decode: {{search: beam, beam: 2, boost_weight: 2}}}}
      tuned: {{decode: {{search: beam, beam: 2, boost_weight: tuned}}}}
""")
    return path


def test_parallel_cells_give_the_serial_lines_and_tune_once_per_model(corpus, tmp_path, capfd):
    serial = run_grid(read_recipe(_recipe(tmp_path, corpus, 1)), quiet=True)
    folder = tmp_path / "runs" / "par"
    assert (serial["evaluated"], serial["trained"]) == (12, 2)
    first = {(g["cell"], g["split"]): g for g in read_lines(folder / "grid.jsonl")}
    hyps = {p.relative_to(folder): p.read_bytes() for p in folder.rglob("grid.*.hyps.jsonl")}
    assert len(hyps) == 12
    # the same models (kept: trained.json), every cell and every tuned weight computed again in parallel
    (folder / "grid.jsonl").unlink()
    for p in list(folder.rglob("grid.*.hyps.jsonl")) + list(folder.rglob("boost_curve.*")):
        p.unlink()
    capfd.readouterr()
    par = run_grid(read_recipe(_recipe(tmp_path, corpus, 2)), quiet=False)
    err = capfd.readouterr().err
    assert (par["evaluated"], par["kept"], par["trained"]) == (12, 0, 0)
    raw = (folder / "grid.jsonl").read_text()
    assert raw.endswith("\n") and all(json.loads(line) for line in raw.splitlines())  # whole lines only
    second = {(g["cell"], g["split"]): g for g in read_lines(folder / "grid.jsonl")}
    assert second.keys() == first.keys()
    for key, line in first.items():
        assert {k: v for k, v in line.items() if k not in TIMING} == \
            {k: v for k, v in second[key].items() if k not in TIMING}, key
    assert {p.relative_to(folder): p.read_bytes() for p in folder.rglob("grid.*.hyps.jsonl")} == hyps
    # one tuning per model (two models, one tuned decoding), before its tuned cells; progress per cell
    assert err.count("chosen on valid") == 2
    for model in ("none", "trie"):  # each model's weight chosen before any of its tuned cells is done
        said = err.splitlines()
        chosen = next(i for i, s in enumerate(said) if s.startswith(f"biasing={model} fusion-tuned: boost weight"))
        cells = [i for i, s in enumerate(said) if f"biasing={model},list_size=" in s and "fusion=tuned" in s]
        assert len(cells) == 2 and min(cells) > chosen
    assert err.count("[12/12]") == 1 and sum(f"[{i}/12]" in err for i in range(1, 13)) == 12
    assert len(list(folder.rglob("boost_curve.fusion-tuned.json"))) == 2
    # a third run, parallel, keeps everything
    again = run_grid(read_recipe(_recipe(tmp_path, corpus, 2)), quiet=True)
    assert (again["evaluated"], again["kept"], again["trained"]) == (0, 12, 0)


def test_sigterm_stops_the_grid_workers_and_a_restart_finishes_the_rest(corpus, tmp_path):
    path = _recipe(tmp_path, corpus, 2, name="stopped", splits="[test_unseen, test, valid]")
    lines_path = tmp_path / "runs" / "stopped" / "grid.jsonl"
    proc = subprocess.Popen([sys.executable, "-m", "tinyrnnt", "experiment", "--quiet", "--recipe", str(path)],
                            cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 240
    while time.monotonic() < deadline and proc.poll() is None:
        if lines_path.is_file() and lines_path.read_text().count("\n") >= 1:
            break
        time.sleep(0.02)
    workers = children(proc.pid)
    assert len(workers) >= 2, "the grid should be evaluating in worker processes"
    stop_with_sigterm(proc, workers)
    kept = read_lines(lines_path)
    assert 1 <= len(kept) < 36, "the grid finished before it could be stopped; the stop was not exercised"
    before = lines_path.read_bytes()
    rest = run_grid(read_recipe(path), quiet=True)
    assert rest["kept"] == len(kept) and rest["evaluated"] == 36 - len(kept)
    assert lines_path.read_bytes().startswith(before) and len({(g["cell"], g["split"]) for g in
                                                               read_lines(lines_path)}) == 36
    shutil.rmtree(tmp_path / "runs")


def test_recipe_arms_evaluated_side_by_side_give_the_serial_results(corpus, tmp_path, capfd):
    # A plain recipe (no grid) with parallel: 2 evaluates its arms in worker processes; every
    # result and comparison equals the serial run's apart from timing.
    from tinyrnnt.lab.recipes import run_recipe

    def recipe(parallel):
        path = tmp_path / f"arms{parallel}.yaml"
        path.write_text(f"""# Tiny: baseline, trie arm and its control, two decodings.
name: arms
out_dir: {tmp_path / 'runs'}
parallel: {parallel}
shared:
  data: {{corpus: {corpus}, batch_size: 8, valid_subset: 16}}
  model: {{encoder_dim: 32, predictor_dim: 32, predictor_embed: 16, joiner_dim: 24, encoder_layers: 2}}
  train: {{steps: 4, minutes: 0, validate_every_steps: 2, threads: 1, snapshot_minutes: 0}}
runs:
  baseline: {{}}
  trie: {{bias: {{kind: trie, cue_dim: 8}}, train: {{init_from: "run:baseline", steps: 2}}}}
evaluate:
  splits: [test_unseen]
  list_sizes: [0, 10]
  decoding: {{greedy: {{}}, beam: {{search: beam, beam: 2}}}}
""")
        return path

    def strip(rows):
        return [{k: v for k, v in r.items() if k not in ("decode_seconds", "rtf")} for r in rows]

    serial = run_recipe(recipe(1), quiet=True)
    folder = tmp_path / "runs" / "arms"
    comparisons = json.loads((folder / "comparisons.json").read_text())
    for results in folder.glob("*/results"):
        shutil.rmtree(results)
    capfd.readouterr()
    parallel = run_recipe(recipe(2), quiet=False, resume=True)  # the arms are kept, every evaluation redone
    assert "evaluating 3 arms side by side, 2 at a time" in capfd.readouterr().err
    assert strip(parallel) == strip(serial) and len(serial) == 3 * 2 * 2
    assert json.loads((folder / "comparisons.json").read_text()) == comparisons
