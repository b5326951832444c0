"""Evaluate a recipe's arms and write its tables: results, comparisons against controls, seeds.

Every results row says how much training stands behind it (total optimiser
steps and training seconds, summed through `init_from`). Every comparison row
names the arm it is measured against (the equal-steps control, or the run the
arm started from), gives the paired-bootstrap 95 % interval of the difference
(Bisani & Ney, ICASSP 2004) and says in words whether it excludes zero. With
several training seeds a second table gives the mean and spread over seeds,
which the per-utterance interval (test-set sampling only) does not cover.
"""

from __future__ import annotations

import csv
import io
import json
import statistics
import sys
from pathlib import Path

from tinyrnnt import config as C
from tinyrnnt.lab.evaluate import write_atomic

TABLE_KEYS = ("wer", "cer", "uwer", "uwer_subdel", "uwer_ins_near_biased", "bwer", "recall", "precision",
              "false_trigger_rate", "rare_recall:unseen")
COMPARED = ("wer", "uwer", "bwer")


def evaluate_arms(arms: dict, trained: dict[str, dict], plan, quiet: bool = False, resume: bool = False,
                  parallel: int = 1) -> dict:
    """{(arm key, decoding, split, list size): (records, summary)}; summaries carry the checkpoint's
    history. A decoding whose boost weight is "tuned" gets its weight from a sweep on plan.tune's
    split for each arm (the curve lands in the arm's results folder), then uses it on every split.

    With resume, an evaluation already on disk for the same checkpoint, limit and decoding is read back.
    With parallel > 1, arms are evaluated side by side, one worker process (one thread) per arm at a
    time; the numbers are those of the serial loop (the same function evaluates each arm), and the
    results keep the arms' order.
    """
    total = len(arms) * len(plan.variants()) * len(plan.splits) * len(plan.list_sizes)
    jobs = [(key, arm, trained[key][f"{plan.checkpoint}_checkpoint"]) for key, arm in arms.items()]
    if parallel <= 1 or len(jobs) < 2:
        results, count = {}, 0
        for key, arm, ckpt in jobs:
            results.update(evaluate_arm(key, arm, ckpt, plan, quiet, resume, (count, total)))
            count += total // len(arms)
        return results
    import multiprocessing as mp
    from concurrent.futures import ProcessPoolExecutor

    from tinyrnnt.lab.armtraining import stop_pool
    from tinyrnnt.lab.gridpool import _one_thread

    if not quiet:
        print(f"evaluating {len(jobs)} arms side by side, {min(parallel, len(jobs))} at a time (one thread each)",
              file=sys.stderr)
    pool = ProcessPoolExecutor(max_workers=min(parallel, len(jobs)), mp_context=mp.get_context("spawn"),
                               initializer=_one_thread)
    try:
        futures = [pool.submit(evaluate_arm, key, arm, ckpt, plan, quiet, resume, None) for key, arm, ckpt in jobs]
        parts = [f.result() for f in futures]
    except BaseException:
        stop_pool(pool)
        raise
    pool.shutdown()
    return {k: v for part in parts for k, v in part.items()}


def evaluate_arm(key: str, arm, ckpt: str, plan, quiet: bool, resume: bool, progress: tuple[int, int] | None) -> dict:
    """One arm's evaluations (every decoding, split and list size), as evaluate_arms describes.
    progress: (evaluations done before this arm, all evaluations) for the bars; None (side by side):
    no bars, a line per evaluation."""
    from tinyrnnt.data import CorpusSplit
    from tinyrnnt.lab.evaluate import evaluate, load_results, save_results
    from tinyrnnt.bias.spotting import can_spot
    from tinyrnnt.lab.fusion import sweep_boost, write_curve
    from tinyrnnt.lab.recipes import decode_settings
    from tinyrnnt.lab.train import load_model, read_history

    results = {}
    count, total = progress or (0, 0)
    model = None
    history = read_history(ckpt)
    folder = Path(arm.cfg.run_dir) / "results"
    for variant, raw in plan.variants().items():
        settings, tuned = decode_settings(variant, raw)
        dcfg = C.apply_overrides(arm.cfg.decode, [f"{k}={json.dumps(v)}" for k, v in settings.items()])
        weight, scale, need_tuning = dcfg.boost_weight, dcfg.model_boost_scale, tuned
        for split_name in plan.splits:
            for n in plan.list_sizes:
                name = f"{split_name}.n{n}" if variant == "greedy" else f"{variant}.{split_name}.n{n}"
                count += 1
                kept = load_results(folder, name) if resume else None
                # decode.spotting is the run's, not the recipe's decoding: compared apart (results saved
                # before it was recorded, 2026-12-03, are redone where the run spots)
                if kept is not None and kept[1].get("checkpoint") == ckpt and kept[1].get("limit") == plan.limit \
                        and kept[1].get("history") == history and kept[1].get("decoding") == raw \
                        and kept[1].get("spotting_asked", False) == bool(dcfg.spotting):
                    results[(key, variant, split_name, n)] = kept
                    if tuned:  # the weight tuned before, read back
                        weight, need_tuning = kept[1]["boost_weight"], False
                        scale = kept[1].get("model_boost_scale", 1.0)
                    continue
                if model is None:
                    model, _, _ = load_model(ckpt)
                spot = bool(dcfg.spotting and can_spot(model))  # this decoding's, with this model
                if need_tuning:
                    sweep = sweep_boost(model, arm.cfg.data.corpus, plan.tune.weights, plan.tune.split,
                                        plan.tune.list_size, dcfg.beam, dcfg.max_symbols, dcfg.boost_where,
                                        dcfg.triggers, plan.tune.objective, plan.limit or None,
                                        label=f"{key} {variant}", sounds_like=dcfg.sounds_like,
                                        model_scales=plan.tune.model_scales if arm.cfg.bias.token_boost else (1.0,),
                                        spotting=spot)
                    write_curve(folder, f"boost_curve.{variant}", sweep)
                    weight, scale, need_tuning = sweep["chosen"], sweep["chosen_model_scale"], False
                    if not quiet:
                        print(f"{key} {variant}: boost weight {weight:g} (model boost x{scale:g}) chosen on "
                              f"{plan.tune.split}", file=sys.stderr)
                boost = None
                if weight != 0:
                    boost = C.apply_overrides(dcfg, [f"boost_weight={weight}", f"model_boost_scale={scale}"]).boost()
                bar = False if quiet or progress is None else f"({count}/{total}) {key} {variant} {split_name} N={n}"
                records, summary = evaluate(model, CorpusSplit(arm.cfg.data.corpus, split_name), list_size=n,
                                            max_symbols=dcfg.max_symbols, limit=plan.limit or None,
                                            search=dcfg.search, beam=dcfg.beam, boost=boost, progress=bar,
                                            sounds_like=dcfg.sounds_like, spotting=spot)
                summary.update(history=history, checkpoint=ckpt, limit=plan.limit, decoding=raw,
                               boost_weight=weight, spotting_asked=bool(dcfg.spotting))
                save_results(folder, name, records, summary)
                results[(key, variant, split_name, n)] = (records, summary)
                if not quiet:
                    print(f"evaluated {key} ({variant}) on {split_name} at N={n}: WER {summary['wer']:.3f}",
                          file=sys.stderr, flush=True)
    return results


def result_rows(arms: dict, results: dict) -> list[dict]:
    rows = []
    for (key, variant, split, n), (_, summary) in results.items():
        arm = arms[key]
        rows.append({"run": arm.run, "seed": arm.seed, "decoding": variant, "boost_weight": summary.get("boost_weight"),
                     "split": split, "list_size": n,
                     "steps": summary["history"]["steps"], "train_s": round(summary["history"]["seconds"], 1),
                     "precision": precision_of(summary["history"]), **{k: summary.get(k) for k in TABLE_KEYS}})
    return rows


def precision_of(history: dict) -> str:
    """The training precision of a model's own run ("fp32" for checkpoints from before the setting)."""
    runs = history.get("runs") or [{}]
    return runs[-1].get("precision", "fp32")


def verdict(cmp: dict) -> str:
    """Plain words for one interval of a difference (system minus reference).

    >>> verdict({"low": -0.3, "high": -0.1}), verdict({"low": -0.1, "high": 0.2})
    ('lower, interval excludes zero', 'no clear difference (interval spans zero)')
    """
    if cmp["low"] is None:
        return "no rate (no words of this kind)"
    if cmp["high"] < 0:
        return "lower, interval excludes zero"
    if cmp["low"] > 0:
        return "higher, interval excludes zero"
    return "no clear difference (interval spans zero)"


def comparison_rows(arms: dict, results: dict) -> list[dict]:
    """Each biased arm against its control and against the arm it started from."""
    from tinyrnnt.score import compare_systems

    rows = []
    for (key, variant, split, n), (records, summary) in results.items():
        arm = arms[key]
        for role, other in (("control", arm.control), ("start", arm.reference)):
            if other is None:
                continue
            theirs, their_summary = results[(other, variant, split, n)]
            mine = {r["id"]: r["counts"] for r in records}
            them = {r["id"]: r["counts"] for r in theirs}
            for rate in COMPARED:
                cmp = compare_systems(them, mine, rate=rate)
                rows.append({"system": arm.run, "against": arms[other].run, "role": role, "seed": arm.seed,
                             "decoding": variant, "split": split, "list_size": n, "metric": rate,
                             "steps": summary["history"]["steps"], "against_steps": their_summary["history"]["steps"],
                             "value": cmp["rate_b"], "against_value": cmp["rate_a"], "delta": cmp["delta"],
                             "low": cmp["low"], "high": cmp["high"], "p_improvement": cmp["p_improvement"],
                             "verdict": verdict(cmp)})
    return rows


def seed_rows(rows: list[dict]) -> list[dict]:
    """Mean and spread (sample standard deviation) over training seeds, per run, split and N."""
    groups: dict[tuple, list[dict]] = {}
    for r in rows:
        groups.setdefault((r["run"], r["decoding"], r["split"], r["list_size"]), []).append(r)
    out = []
    for (run, variant, split, n), rs in groups.items():
        if len(rs) < 2:
            continue
        row = {"run": run, "decoding": variant, "split": split, "list_size": n, "seeds": len(rs)}
        for k in ("wer", "uwer", "bwer", "recall"):
            vals = [r[k] for r in rs if r[k] is not None]
            row[f"{k}_mean"] = statistics.fmean(vals) if vals else None
            row[f"{k}_sd"] = statistics.stdev(vals) if len(vals) > 1 else None
        out.append(row)
    return out


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


def to_csv(rows: list[dict]) -> str:
    """Rows (dicts with the same keys) as CSV text, header first; empty text for no rows."""
    buf = io.StringIO()
    if rows:
        w = csv.DictWriter(buf, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    return buf.getvalue()


def write_tables(folder: Path, arms: dict, results: dict) -> dict:
    rows = result_rows(arms, results)
    comparisons = comparison_rows(arms, results)
    seeds = seed_rows(rows)
    parts = [("results", rows), ("comparisons", comparisons)] + ([("seeds", seeds)] if seeds else [])
    for name, table in parts:
        write_atomic(folder / f"{name}.csv", to_csv(table))
        write_atomic(folder / f"{name}.json", json.dumps(table, indent=1) + "\n")
    short = [{k: c[k] for k in ("system", "against", "role", "seed", "decoding", "split", "list_size", "metric", "steps",
                                "against_steps", "value", "against_value", "low", "high", "verdict")}
             for c in comparisons]
    md = ("## Results (steps and training seconds: totals behind each evaluated model)\n\n"
          + markdown_table(rows)
          + "\n\n## Differences against the control arm and the starting run (95 % paired-bootstrap interval)\n\n"
          + markdown_table(short)
          + (("\n\n## Spread over training seeds\n\n" + markdown_table(seeds)) if seeds else "") + "\n")
    write_atomic(folder / "results.md", md)
    return {"rows": rows, "comparisons": comparisons, "seeds": seeds, "markdown": md}
