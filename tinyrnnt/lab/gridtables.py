"""A grid's tables (one row per cell and split; each cell against its reference cell) and its tuned
boost weights. Helpers of tinyrnnt.lab.grid."""

from __future__ import annotations

import json
from pathlib import Path

from tinyrnnt import config as C
from tinyrnnt.lab.evaluate import write_atomic

SHOWN = ("steps", "boost_weight", "wer", "uwer", "bwer", "recall", "false_trigger_rate", "decode_seconds")


def tuned_weight(model, cfg, dcfg, evaluate_plan, decoding: str, say) -> float:
    """The boost weight chosen on the tuning split (evaluate.tune of the recipe) for one model and
    decoding; a curve already saved for the same grid of weights and split is read back."""
    from tinyrnnt.bias.spotting import can_spot
    from tinyrnnt.lab.fusion import sweep_boost, write_curve

    tune = evaluate_plan.tune
    folder = Path(cfg.run_dir) / "results"
    saved = folder / f"boost_curve.{decoding}.json"
    spotting = bool(dcfg.spotting and can_spot(model))
    if saved.is_file():
        sweep = json.loads(saved.read_text(encoding="utf-8"))
        if ([r["weight"] for r in sweep["rows"]] == [float(w) for w in tune.weights] and sweep["split"] == tune.split
                and sweep["list_size"] == tune.list_size and sweep["where"] == dcfg.boost_where
                and sweep["objective"] == tune.objective and sweep.get("sounds_like", 0) == dcfg.sounds_like
                and sweep.get("spotting", False) == spotting):
            return sweep["chosen"]
    sweep = sweep_boost(model, cfg.data.corpus, tune.weights, tune.split, tune.list_size, dcfg.beam, dcfg.max_symbols,
                        dcfg.boost_where, dcfg.triggers, tune.objective, evaluate_plan.limit or None,
                        label=f"{cfg.name} {decoding}", sounds_like=dcfg.sounds_like, spotting=spotting)
    write_curve(folder, f"boost_curve.{decoding}", sweep)
    say(f"{cfg.name} {decoding}: boost weight {sweep['chosen']:g} chosen on {tune.split}")
    return sweep["chosen"]


def comparison_rows(plan, lines: list[dict]) -> list[dict]:
    """Each cell against the cell that differs only by holding the reference label on a compared
    axis (paired bootstrap of WER, U-WER and B-WER over the same utterances)."""
    from tinyrnnt.lab.evaluate import load_results
    from tinyrnnt.lab.tables import COMPARED, verdict
    from tinyrnnt.score import compare_systems

    by_labels = {(tuple((a, line[a]) for a in plan.axes), line["split"]): line for line in lines}
    rows = []
    for axis, ref in plan.compare.items():
        for line in lines:
            if line[axis] == str(ref):
                continue
            key = tuple((a, str(ref) if a == axis else line[a]) for a in plan.axes)
            other = by_labels.get((key, line["split"]))
            if other is None:
                continue
            mine = load_results(Path(line["run_dir"]) / "results", line["hyps"])
            theirs = load_results(Path(other["run_dir"]) / "results", other["hyps"])
            if mine is None or theirs is None:
                raise C.ConfigError(f"{line['run_dir']}/results/{line['hyps']}: hypotheses of a finished grid cell "
                                    "are missing; remove its line from grid.jsonl to compute it again")
            for rate in COMPARED:
                cmp = compare_systems({r["id"]: r["counts"] for r in theirs[0]},
                                      {r["id"]: r["counts"] for r in mine[0]}, rate=rate)
                rows.append({"cell": line["cell"], "against": other["cell"], "split": line["split"], "metric": rate,
                             "steps": line["steps"], "against_steps": other["steps"], "value": cmp["rate_b"],
                             "against_value": cmp["rate_a"], "delta": cmp["delta"], "low": cmp["low"],
                             "high": cmp["high"], "p_improvement": cmp["p_improvement"], "verdict": verdict(cmp)})
    return rows


def write_grid_tables(folder: Path, plan, lines: list[dict]) -> dict:
    """grid_results.{csv,json,md} and, with `compare`, grid_comparisons.{csv,json}."""
    from tinyrnnt.lab.tables import to_csv
    from tinyrnnt.lab.tables import markdown_table

    rows = [{"cell": g["cell"], "split": g["split"], **{a: g[a] for a in plan.axes}, **{k: g.get(k) for k in SHOWN}}
            for g in lines]
    comparisons = comparison_rows(plan, lines)
    for name, table in (("grid_results", rows), ("grid_comparisons", comparisons)):
        if table:
            write_atomic(folder / f"{name}.csv", to_csv(table))
            write_atomic(folder / f"{name}.json", json.dumps(table, indent=1) + "\n")
    md = "## Grid: every cell\n\n" + markdown_table([{k: v for k, v in r.items() if k != "cell"} for r in rows])
    if comparisons:
        md += ("\n\n## Grid: each cell against its reference cell (95 % paired-bootstrap interval)\n\n"
               + markdown_table(comparisons))
    write_atomic(folder / "grid_results.md", md + "\n")
    return {"rows": rows, "comparisons": comparisons, "markdown": md}
