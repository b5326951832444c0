"""A recipe's cost measurement (tinyrnnt.lab.cost) on the models it has just trained.

A recipe with `cost: {sizes: [...]}` trains its runs as usual, evaluates them,
then measures, for each biasing method, the training step time and the
decoding time per utterance at every list size N (one thread, each method in
its own process), and peak memory at the largest N. The runs must be named as
the methods' models are (tinyrnnt.lab.cost.METHODS: baseline, trie, attention,
trie_attention; shallow fusion decodes the baseline). It writes into the
results folder's `cost/`: cost.json, cost.md, cost.png, and the tables
cost_*.csv that `tinyrnnt report` shows and plots against N.
"""

from __future__ import annotations

import sys
from dataclasses import dataclass
from pathlib import Path

from tinyrnnt import config as C


@dataclass
class CostPlan:
    sizes: tuple[int, ...] = ()  # list sizes N to time; empty = no cost measurement
    utterances: int = 10  # utterances of test_unseen timed per size (after 2 untimed warm-up ones)
    train_batch: int = 4  # utterances in the timed training batch (the first of the timed ones)
    train_repeats: int = 2  # timed training steps per size (median), after one untimed step

    def __post_init__(self):
        C.require(self, "cost", positive=("utterances", "train_batch", "train_repeats"))
        if any(isinstance(n, bool) or not isinstance(n, int) or n < 1 for n in self.sizes):
            raise C.ConfigError(f"cost.sizes: expected list sizes, whole numbers >= 1, got {list(self.sizes)}")
        if self.train_batch > self.utterances:
            raise C.ConfigError(f"cost.train_batch ({self.train_batch}) cannot exceed cost.utterances "
                                f"({self.utterances}): the batch is made of the timed utterances")


    def check_runs(self, runs) -> None:
        """The recipe holds a run for each method's model (checked before anything trains)."""
        from tinyrnnt.lab.cost import METHODS

        needed = sorted({arm for arm, _ in METHODS.values()})
        missing = [r for r in needed if r not in runs]
        if self.sizes and missing:
            raise C.ConfigError(f"cost: measuring costs needs runs named {needed} (one model per biasing method); "
                                f"missing {missing}; runs: {list(runs)}")


def cost_rows(costs: dict) -> dict[str, list[dict]]:
    """Tables for the report: one row per list size with a column per method, and peak memory.

    >>> costs = {"settings": {"sizes": [10, 100]}, "decode_ms_per_utt": {"none": {"10": 1.0, "100": 1.5}},
    ...          "train_step_ms": {"none": {"10": 9.0, "100": 9.5}}, "rtf": {"none": {"10": 0.1, "100": 0.2}},
    ...          "peak_memory_mb": {"none": {"peak": 300.0, "above_loaded": 12.0, "at_list_size": 100}}}
    >>> cost_rows(costs)["cost_decode_ms"]
    [{'list_size': 10, 'none': 1.0}, {'list_size': 100, 'none': 1.5}]
    >>> cost_rows(costs)["cost_peak_memory_mb"]
    [{'method': 'none', 'peak_mb': 300.0, 'above_loaded_mb': 12.0, 'at_list_size': 100}]
    """
    tables = {}
    for name, key in (("cost_decode_ms", "decode_ms_per_utt"), ("cost_train_step_ms", "train_step_ms"),
                      ("cost_real_time_factor", "rtf")):
        tables[name] = [{"list_size": n, **{m: row.get(str(n)) for m, row in costs[key].items()}}
                        for n in costs["settings"]["sizes"]]
    tables["cost_peak_memory_mb"] = [{"method": m, "peak_mb": v["peak"], "above_loaded_mb": v["above_loaded"],
                                      "at_list_size": v["at_list_size"]} for m, v in costs["peak_memory_mb"].items()]
    return tables


def method_checkpoints(recipe, arms: dict, trained: dict) -> dict[str, str]:
    """{model name of tinyrnnt.lab.cost.METHODS: checkpoint}, from the recipe's first seed."""
    from tinyrnnt.lab.cost import METHODS

    needed = sorted({arm for arm, _ in METHODS.values()})
    first = {arm.run: key for key, arm in arms.items() if arm.seed == recipe.seeds[0]}
    recipe.cost.check_runs(first)
    return {r: trained[first[r]][f"{recipe.evaluate.checkpoint}_checkpoint"] for r in needed}


def run_cost(recipe, arms: dict, trained: dict, quiet: bool = False) -> dict:
    """Measure, write cost.json / cost.md / cost.png and the cost_*.csv tables; returns the costs."""
    from tinyrnnt.data import CorpusSplit
    from tinyrnnt.lab.cost import measure_costs, write_cost_report
    from tinyrnnt.lab.evaluate import write_atomic
    from tinyrnnt.lab.tables import markdown_table, to_csv

    plan = recipe.cost
    checkpoints = method_checkpoints(recipe, arms, trained)
    corpus = next(a.cfg.data.corpus for a in arms.values() if a.run == "baseline")
    have = len(CorpusSplit(corpus, "test_unseen"))
    if plan.utterances + 2 > have:
        raise C.ConfigError(f"cost.utterances: {plan.utterances} timed + 2 warm-up utterances, but test_unseen of "
                            f"{corpus} holds {have}")
    if not quiet:
        print(f"measuring costs at N = {list(plan.sizes)} on {plan.utterances} utterances, one method at a time",
              file=sys.stderr, flush=True)
    costs = measure_costs(checkpoints, corpus, tuple(plan.sizes), utterances=plan.utterances,
                          train_batch=plan.train_batch, train_repeats=plan.train_repeats, quiet=quiet)
    folder = Path(recipe.out_dir) / recipe.name / "cost"
    write_cost_report(folder, costs)
    tables = cost_rows(costs)
    for name, rows in tables.items():
        write_atomic(folder / f"{name}.csv", to_csv(rows))
    if not quiet:
        print("\n".join(f"## {name}\n\n{markdown_table(rows)}\n" for name, rows in tables.items()))
        print(f"cost tables and plot in {folder}", file=sys.stderr)
    return costs
