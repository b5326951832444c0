"""Recipes end to end: build the corpus if missing, train each run, evaluate, write a table.

A recipe YAML is either the differences of one experiment from the defaults
(`recipes/baseline.yaml`), or several runs that share settings:

    shared: {...}            # differences every run gets
    runs:                    # run name -> its own differences
      baseline: {}
    evaluate:                # what to decode and score
      splits: [test, test_unseen]
      list_sizes: [0, 10, 100, 1000]
"""

from __future__ import annotations

import csv
import io
import json
import sys
from dataclasses import dataclass, field
from pathlib import Path

import yaml

from tinyrnnt import config as C
from tinyrnnt.experiment import ExperimentConfig
from tinyrnnt.lab.evaluate import write_atomic

RECIPE_DIR = Path(__file__).resolve().parents[2] / "recipes"
DEFAULT_RECIPE = "trie_vs_baseline.yaml"  # what `tinyrnnt experiment` runs with no recipe named
TABLE_KEYS = ("wer", "cer", "uwer", "bwer", "recall", "precision", "false_trigger_rate", "rare_recall:unseen")


@dataclass
class EvalPlan:
    splits: tuple[str, ...] = ("test", "test_unseen")
    list_sizes: tuple[int, ...] = (0, 100)
    limit: int = 0  # utterances per split (0 = all)


@dataclass
class Recipe:
    name: str = "baseline"
    out_dir: str = "runs"
    shared: dict = field(default_factory=dict)
    runs: dict = field(default_factory=lambda: {"baseline": {}})
    evaluate: EvalPlan = field(default_factory=EvalPlan)
    parallel: int = 1  # runs trained at once, each in its own process (give each train.threads=1)


def read_recipe(path: str | Path | None) -> Recipe:
    if path is None:
        path = RECIPE_DIR / DEFAULT_RECIPE
    path = Path(path)
    if not path.is_file():
        raise C.ConfigError(f"{path}: recipe file not found")
    data = yaml.safe_load(path.read_text(encoding="utf-8")) or {}
    if not isinstance(data, dict):
        raise C.ConfigError(f"{path}: a recipe is a mapping")
    if "runs" not in data:  # a single experiment's differences
        data = {"name": path.stem, "shared": data, "runs": {data.get("name", path.stem): {}}}
    data.setdefault("name", path.stem)
    return C.from_dict(Recipe, data, str(path))


def run_config(recipe: Recipe, run: str, overrides=()) -> ExperimentConfig:
    base = C.to_dict(ExperimentConfig())
    merged = C._merge(C._merge(base, recipe.shared, "shared"), recipe.runs[run] or {}, f"runs.{run}")
    merged["name"] = run
    merged["run_dir"] = str(Path(recipe.out_dir) / recipe.name / run)
    cfg = C.from_dict(ExperimentConfig, merged, f"recipe {recipe.name}, run {run}")
    return C.apply_overrides(cfg, list(overrides))


def ensure_corpus(cfg: ExperimentConfig, quiet: bool = False) -> None:
    from tinyrnnt.synth.card import format_card
    from tinyrnnt.synth.corpus import build_corpus

    if not (Path(cfg.data.corpus) / "card.json").is_file():
        card = build_corpus(cfg.corpus, cfg.data.corpus, quiet=quiet)
        if not quiet:
            print(format_card(card), file=sys.stderr)


def run_recipe(path=None, overrides=(), quiet: bool = False) -> list[dict]:
    from tinyrnnt.data import CorpusSplit
    from tinyrnnt.lab.evaluate import evaluate, save_results
    from tinyrnnt.lab.train import load_model

    recipe = read_recipe(path)
    configs = {run: run_config(recipe, run, overrides) for run in recipe.runs}
    for cfg in configs.values():
        ensure_corpus(cfg, quiet)
    results = train_all(configs, recipe.parallel, quiet)
    rows = []
    for run, cfg in configs.items():
        result = results[run]
        model, _, _ = load_model(result["best_checkpoint"])
        for split_name in recipe.evaluate.splits:
            split = CorpusSplit(cfg.data.corpus, split_name)
            for n in recipe.evaluate.list_sizes:
                records, summary = evaluate(model, split, list_size=n, max_symbols=cfg.decode.max_symbols,
                                            limit=recipe.evaluate.limit or None)
                save_results(Path(cfg.run_dir) / "results", f"{split_name}.n{n}", records, summary)
                rows.append({"run": run, "split": split_name, "list_size": n,
                             "train_minutes": round(result["train_seconds"] / 60, 2),
                             **{k: summary.get(k) for k in TABLE_KEYS}})
    write_table(Path(recipe.out_dir) / recipe.name, rows)
    print(markdown_table(rows))
    return rows


def _train_one(cfg: ExperimentConfig, quiet: bool) -> dict:
    from tinyrnnt.lab.train import train

    r = train(cfg, quiet=quiet)
    return {"best_checkpoint": str(r.best_checkpoint), "train_seconds": r.train_seconds, "steps": r.steps}


def train_all(configs: dict[str, ExperimentConfig], parallel: int, quiet: bool) -> dict[str, dict]:
    """Train every run; with parallel > 1, that many at once in separate processes.

    On 2 cores two one-thread runs side by side finish sooner than the same runs
    one after the other with two threads each (measured: a second thread buys ~1.3x).
    """
    chained = any(cfg.train.init_from.startswith("run:") for cfg in configs.values())
    if parallel <= 1 or len(configs) == 1 or chained:
        done: dict[str, dict] = {}
        for run, cfg in configs.items():  # in recipe order, so a run can start from an earlier one
            if cfg.train.init_from.startswith("run:"):
                source = cfg.train.init_from[len("run:"):]
                if source not in done:
                    raise C.ConfigError(f"run {run!r}: train.init_from names run {source!r}, "
                                        f"which must come earlier in the recipe; runs: {list(configs)}")
                cfg = C.apply_overrides(cfg, [f"train.init_from={done[source]['best_checkpoint']}"])
            done[run] = _train_one(cfg, quiet)
        return done
    import multiprocessing as mp
    from concurrent.futures import ProcessPoolExecutor

    with ProcessPoolExecutor(max_workers=parallel, mp_context=mp.get_context("spawn")) as pool:
        futures = {run: pool.submit(_train_one, cfg, True) for run, cfg in configs.items()}
        return {run: f.result() for run, f in futures.items()}


def _fmt(v) -> str:
    if v is None:
        return "-"
    return f"{v:.3f}" if isinstance(v, float) else str(v)


def markdown_table(rows: list[dict]) -> str:
    if not rows:
        return "(no results)"
    keys = list(rows[0])
    lines = ["| " + " | ".join(keys) + " |", "|" + "---|" * len(keys)]
    lines += ["| " + " | ".join(_fmt(r[k]) for k in keys) + " |" for r in rows]
    return "\n".join(lines)


def write_table(folder: Path, rows: list[dict]) -> None:
    buf = io.StringIO()
    if rows:
        w = csv.DictWriter(buf, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    write_atomic(folder / "results.csv", buf.getvalue())
    write_atomic(folder / "results.json", json.dumps(rows, indent=1) + "\n")
    write_atomic(folder / "results.md", markdown_table(rows) + "\n")
