"""The `attention` benchmark: attention over the list and trie + attention, accuracy and cost.

Arms (recipe tinyrnnt/recipes/attention_vs_trie.yaml): the trie benchmark's
baseline, trie arm and equal-steps control (read from its run folder, or
trained there by its code when missing), and two new arms that fine-tune the
same baseline checkpoint with the trie arm's steps, schedule and training
lists: attention, and trie + attention. Accuracy: B-WER and biased-word recall
on the unseen-name test split at N = 100 (greedy), each gain with its interval
against the shared control, and the recall of trie + attention against each
input alone with the interval of the difference (the issue's ordering); the
no-list WER on the in-domain test split.

Cost (tinyrnnt.lab.cost): training step time and decoding time per utterance at
each list size, one thread, for no biasing, trie cue, attention, both and
shallow fusion; peak memory at the largest size; the real-time factor of
attention-biased decoding there; a table and a log-log plot.
"""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

RECIPE = "attention_vs_trie"
TRIE_ARMS = ("baseline", "trie", "trie_control")  # read from the trie benchmark
NEW_ARMS = ("attention", "trie_attention")  # trained here


def _log(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


def _comparable(config: dict) -> dict:
    """A saved config as it trains, with today's defaults for settings added since; where it lives,
    its name and its start checkpoint (a path) left out."""
    from tinyrnnt.experiment import with_defaults

    d = with_defaults(config)
    d.pop("run_dir"), d.pop("name"), d.pop("decode")
    d["train"] = {k: v for k, v in d["train"].items() if k != "init_from"}
    d["data"] = {k: v for k, v in d["data"].items() if k != "corpus"}
    return d


def trie_models(args, arms) -> dict[str, str]:
    """Last checkpoints of the trie benchmark's arms: read back when its run folder holds them trained
    with this recipe's settings, else trained there by the trie benchmark's code."""
    from tinyrnnt import config as C
    from tinyrnnt.lab.triebench import train_recipe

    folder = Path(args.trie_run_dir)
    facts = folder / "trained.json"
    if facts.is_file():
        trained = json.loads(facts.read_text(encoding="utf-8"))
        same = all(_comparable(trained["configs"][k]) == _comparable(C.to_dict(arms[k].cfg)) for k in TRIE_ARMS
                   if k in trained.get("configs", {}))
        paths = {k: folder / k / "checkpoints" / "last.ckpt" for k in TRIE_ARMS}
        if same and all(k in trained["configs"] for k in TRIE_ARMS) and all(p.is_file() for p in paths.values()):
            _log(f"*** REUSING the trie benchmark's models from {folder} ***")
            return {k: str(p) for k, p in paths.items()}
        _log(f"{facts}: other settings or missing checkpoints; training the trie benchmark's arms there")
    sub = type(args)(**vars(args))
    sub.run_dir, sub.seeds, sub.fresh = str(folder), 1, False
    _, _, trained, _ = train_recipe(sub)
    return {k: trained["arms"][k]["last_checkpoint"] for k in TRIE_ARMS}


def new_arms(args, arms, baseline_ckpt: str) -> dict[str, str]:
    """Train attention and trie + attention from the baseline checkpoint (or keep them, --resume /
    a finished run with the same settings)."""
    from tinyrnnt import config as C
    from tinyrnnt.lab.recipes import train_arms

    todo = {}
    for key in NEW_ARMS:
        arm = arms[key]
        arm.cfg = C.apply_overrides(arm.cfg, [f"train.init_from={baseline_ckpt}",
                                              f"run_dir={Path(args.run_dir) / key}"])
        arm.source = None
        todo[key] = arm
    t0 = time.perf_counter()
    done = train_arms(todo, parallel=2, quiet=True, resume=not args.fresh)
    _log(f"attention arms ready in {time.perf_counter() - t0:.0f} s")
    return {k: done[k]["last_checkpoint"] for k in NEW_ARMS}


def _identity(ckpt: str) -> str:
    """A checkpoint's path and modification time: results of an older file at the same path are stale."""
    p = Path(ckpt).resolve()
    return f"{p}@{p.stat().st_mtime_ns}"


def accuracy(args, checkpoints: dict[str, str], spotting: dict[str, bool]) -> dict:
    """Greedy decoding of test_unseen at N = 100 and test with no list, every arm (with keyword
    spotting where its recipe says decode.spotting and its model can spot); results saved in
    RUN_DIR/results/ARM/ (read back when present and the checkpoint and spotting are the same)."""
    import torch

    from tinyrnnt.bias.spotting import can_spot
    from tinyrnnt.data import CorpusSplit
    from tinyrnnt.lab.evaluate import evaluate, load_results, save_results
    from tinyrnnt.lab.train import load_model, read_history
    from tinyrnnt.score import compare_systems

    torch.set_num_threads(2)
    out, counts = {}, {}
    for key, ckpt in checkpoints.items():
        model = load_model(ckpt)[0]
        spot = spotting.get(key, False) and can_spot(model)  # the arm's decode.spotting in the recipe
        for split_name, n in (("test_unseen", 100), ("test", 0)):
            folder, name = Path(args.run_dir) / "results" / key, f"{split_name}.n{n}"
            saved = load_results(folder, name)
            if saved is None or saved[1].get("checkpoint") != _identity(ckpt) or saved[1].get("spotting", False) != spot:
                records, summary = evaluate(model, CorpusSplit(args.corpus, split_name), list_size=n,
                                            limit=args.limit or None, spotting=spot)
                summary["checkpoint"] = _identity(ckpt)
                save_results(folder, name, records, summary)
                saved = records, summary
            records, summary = saved
            out[(key, split_name)] = summary
            counts[(key, split_name)] = {r["id"]: r["counts"] for r in records}
            _log(f"{key:16s} {name:18s} WER {summary['wer']:.3f} B-WER {summary['bwer'] or 0:.3f} "
                 f"recall {summary['recall'] or 0:.3f}")
    r4 = lambda v: None if v is None else round(v, 4)  # noqa: E731
    res = {}
    for key, label in (("baseline", "baseline"), ("trie_control", "control"), ("trie", "trie"),
                       ("attention", "attention"), ("trie_attention", "trie_attention")):
        s = out[(key, "test_unseen")]
        res[f"bwer_{label}_n100"] = r4(s["bwer"])
        res[f"recall_{label}_n100"] = r4(s["recall"])
        res[f"uwer_{label}_n100"] = r4(s["uwer"])
        res[f"wer_{label}_n0"] = r4(out[(key, "test")]["wer"])
    for key, label in (("attention", "attention"), ("trie_attention", "trie_attention"), ("trie", "trie")):
        ci = compare_systems(counts[("trie_control", "test_unseen")], counts[(key, "test_unseen")], rate="bwer")
        res[f"bwer_delta_{label}_vs_control_ci95_n100"] = [r4(ci["low"]), r4(ci["high"])]
    for key, label in (("attention", "attention"), ("trie_attention", "trie_attention")):
        ci = compare_systems(counts[("baseline", "test_unseen")], counts[(key, "test_unseen")], rate="bwer")
        res[f"bwer_delta_{label}_vs_baseline_ci95_n100"] = [r4(ci["low"]), r4(ci["high"])]
    for key, label in (("trie", "trie"), ("attention", "attention")):  # the ordering, with its interval
        ci = compare_systems(counts[(key, "test_unseen")], counts[("trie_attention", "test_unseen")], rate="recall")
        res[f"recall_delta_trie_attention_vs_{label}_ci95_n100"] = [r4(ci["low"]), r4(ci["high"])]
    res["bwer_by_style_n100"] = {key: {k[len("bwer:style:"):]: r4(v) for k, v in out[(key, "test_unseen")].items()
                                       if k.startswith("bwer:style:")} for key in checkpoints}
    res["train_steps"] = {key: read_history(ckpt)["steps"] for key, ckpt in checkpoints.items()}
    res["spotting"] = {key: bool(out[(key, "test_unseen")].get("spotting")) for key in checkpoints}
    return res


def run_attention_bench(args) -> dict:
    from tinyrnnt.lab.cost import measure_costs, write_cost_report
    from tinyrnnt.lab.recipes import ensure_corpus, expand_arms, read_recipe

    t_start = time.perf_counter()
    recipe = read_recipe(RECIPE)
    arms = expand_arms(recipe, [f"data.corpus={args.corpus}"])
    ensure_corpus(arms["baseline"].cfg, build=True)
    checkpoints = trie_models(args, arms)
    checkpoints.update(new_arms(args, arms, checkpoints["baseline"]))
    t_acc = time.perf_counter()
    result = accuracy(args, checkpoints, {k: arm.cfg.decode.spotting for k, arm in arms.items()})
    acc_s = time.perf_counter() - t_acc
    sizes = tuple(int(n) for n in args.sizes.split(","))
    t_cost = time.perf_counter()
    costs = measure_costs(checkpoints, args.corpus, sizes, utterances=args.timing_utts, quiet=False)
    write_cost_report(Path(args.run_dir) / "cost", costs)
    _log(f"cost table and plot in {Path(args.run_dir) / 'cost'}")
    result.update({
        "decode_ms_per_utt": costs["decode_ms_per_utt"],
        "train_step_ms": costs["train_step_ms"],
        "peak_memory_mb": costs["peak_memory_mb"],
        "rtf_attention_n5000": costs["rtf"]["attention"].get("5000"),
        "rtf_by_method": costs["rtf"],
        "cost_settings": costs["settings"],
        "accuracy_s": round(acc_s, 1),
        "cost_s": round(time.perf_counter() - t_cost, 1),
        "bench_wall_s": round(time.perf_counter() - t_start, 1),
    })
    return result
