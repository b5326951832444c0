"""The `trie` benchmark: trie-based deep biasing against the baseline, the whole recipe timed."""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

from tinyrnnt.lab.evaluate import evaluate, save_results, write_atomic

RECIPE = Path(__file__).resolve().parents[2] / "recipes" / "trie_vs_baseline.yaml"


def _log(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


def cue_cost_ratio(repeats: int = 9) -> tuple[float, float, float]:
    """Median-of-medians ms of the batched training cue at N = 10 and N = 5000, and their ratio.

    After an untimed warm-up, the two sizes are timed in alternation (one seed each, in
    turn), so a slow spell of the machine falls on both rather than on one of them.
    """
    import statistics

    from tinyrnnt.bias.trie import time_cue

    time_cue(10, repeats=3), time_cue(5000, repeats=3)  # warm-up: first calls in a process are slower
    small, large = [], []
    for k in range(repeats):
        small.append(time_cue(10, seed=k))
        large.append(time_cue(5000, seed=k))
    s, g = statistics.median(small), statistics.median(large)
    return s, g, g / s


def run_trie_bench(args) -> dict:
    import torch

    from tinyrnnt.data import CorpusSplit
    from tinyrnnt.lab.recipes import ensure_corpus, read_recipe, run_config, train_all
    from tinyrnnt.lab.train import load_model
    from tinyrnnt.score import compare_systems

    small, large, ratio = cue_cost_ratio()
    _log(f"cue ms: N=10 {small:.2f}, N=5000 {large:.2f} (ratio {ratio:.2f})")
    recipe = read_recipe(RECIPE)
    recipe.out_dir = str(Path(args.run_dir).parent)
    recipe.name = Path(args.run_dir).name
    overrides = [f"data.corpus={args.corpus}"] + ([f"train.minutes={args.minutes}"] if args.minutes else [])
    configs = {run: run_config(recipe, run, overrides) for run in recipe.runs}
    t_start = time.perf_counter()
    ensure_corpus(configs["baseline"])
    corpus_s = json.loads((Path(args.corpus) / "build.json").read_text())["build_seconds"]
    facts_path = Path(args.run_dir) / "trained.json"
    if args.fresh or not facts_path.is_file():
        t0 = time.perf_counter()
        trained = train_all(configs, recipe.parallel, quiet=True)
        trained["wall_seconds"] = time.perf_counter() - t0
        write_atomic(facts_path, json.dumps(trained, indent=1))
    else:
        trained = json.loads(facts_path.read_text())
        _log(f"{facts_path} exists: evaluating those models (use --fresh to train again)")
    t_eval = time.perf_counter()
    torch.set_num_threads(2)
    models = {run: load_model(trained[run]["best_checkpoint"])[0] for run in configs}
    plan = [("test_unseen", n, False) for n in (0, 10, 100, 1000)] + [("test_unseen", 100, True), ("test", 0, False)]
    results: dict[tuple, tuple] = {}
    for split_name, n, confusable in plan:
        split = CorpusSplit(args.corpus, split_name)
        for run, model in models.items():
            records, summary = evaluate(model, split, list_size=n, confusable=confusable)
            name = f"{split_name}.n{n}" + (".confusable" if confusable else "")
            save_results(Path(configs[run].run_dir) / "results", name, records, summary)
            results[(run, split_name, n, confusable)] = (records, summary)
            _log(f"{run:9s} {name:24s} WER {summary['wer']:.3f} U-WER {summary['uwer'] or 0:.3f} "
                 f"B-WER {summary['bwer'] if summary['bwer'] is not None else float('nan'):.3f} "
                 f"recall {summary['recall'] if summary['recall'] is not None else float('nan'):.3f} "
                 f"false-trigger {summary['false_trigger_rate'] or 0:.3f}")
    eval_s = time.perf_counter() - t_eval

    def s(run, split="test_unseen", n=100, confusable=False):
        return results[(run, split, n, confusable)][1]

    def counts(run, split="test_unseen", n=100, confusable=False):
        return [r["counts"] for r in results[(run, split, n, confusable)][0]]

    bwer_ci = compare_systems(counts("baseline"), counts("trie"), rate="bwer")
    uwer_ci = compare_systems(counts("baseline"), counts("trie"), rate="uwer")
    # the corpus part is its recorded build time (built now or earlier), so the figure is the whole recipe
    recipe_s = corpus_s + trained["wall_seconds"] + eval_s
    r3 = lambda v: None if v is None else round(v, 4)  # noqa: E731
    out = {
        "bwer_baseline_n100": r3(s("baseline")["bwer"]),
        "bwer_trie_n100": r3(s("trie")["bwer"]),
        "bwer_relative_reduction_n100": r3(1 - s("trie")["bwer"] / s("baseline")["bwer"]),
        "bwer_delta_ci95_n100": [r3(bwer_ci["low"]), r3(bwer_ci["high"])],
        "uwer_baseline_n100": r3(s("baseline")["uwer"]),
        "uwer_trie_n100": r3(s("trie")["uwer"]),
        "uwer_delta_ci95_n100": [r3(uwer_ci["low"]), r3(uwer_ci["high"])],
        "false_trigger_baseline": r3(s("baseline")["false_trigger_rate"]),
        "false_trigger_trie": r3(s("trie")["false_trigger_rate"]),
        "recall_baseline_n100": r3(s("baseline")["recall"]),
        "recall_trie_n100": r3(s("trie")["recall"]),
        "bwer_baseline_n10": r3(s("baseline", n=10)["bwer"]),
        "bwer_trie_n10": r3(s("trie", n=10)["bwer"]),
        "bwer_baseline_n1000": r3(s("baseline", n=1000)["bwer"]),
        "bwer_trie_n1000": r3(s("trie", n=1000)["bwer"]),
        "cue_cost_ratio_5000_10": round(ratio, 3),
        "cue_ms_n10": round(small, 3),
        "cue_ms_n5000": round(large, 3),
        "recipe_s": round(recipe_s, 1),
        "recipe_parts_s": {"corpus": corpus_s, "training": round(trained["wall_seconds"], 1), "evaluation": round(eval_s, 1)},
        "wer_baseline_n0": r3(s("baseline", "test", 0)["wer"]),
        "wer_trie_n0": r3(s("trie", "test", 0)["wer"]),
        "familiar_recall_baseline_n0": r3(s("baseline", "test", 0).get("rare_recall:frequent")),
        "familiar_recall_trie_n0": r3(s("trie", "test", 0).get("rare_recall:frequent")),
        "wer_baseline_unseen_n0": r3(s("baseline", n=0)["wer"]),
        "wer_trie_unseen_n0": r3(s("trie", n=0)["wer"]),
        "recall_baseline_homophone_n100": r3(s("baseline", confusable=True)["recall"]),
        "recall_trie_homophone_n100": r3(s("trie", confusable=True)["recall"]),
        "false_trigger_trie_homophone_n100": r3(s("trie", confusable=True)["false_trigger_rate"]),
        "bwer_trie_homophone_n100": r3(s("trie", confusable=True)["bwer"]),
        "train_minutes": {run: round(trained[run]["train_seconds"] / 60, 2) for run in configs},
        "bench_wall_s": round(time.perf_counter() - t_start, 1),
    }
    return out
