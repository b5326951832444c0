"""Grids of runs: a recipe's `grid` section declares axes; every cell (one label of each axis) is
trained if needed, decoded and scored, and its results appended to one JSON Lines file.

    grid:
      start_from: baseline        # optional: every grid model fine-tunes this recipe run's last checkpoint
      splits: [test_unseen]
      compare: {biasing: none}    # each cell against the cell with this label (paired bootstrap)
      axes:                       # in this order; every combination is a cell
        biasing:                  # label -> differences from `shared` (experiment settings)
          none: {}
          trie_joiner: {bias: {kind: trie, inject: joiner}}
        seed: [0, 1]              # training seeds (train.seed)
        list_size: [10, 100]      # biasing list size at evaluation
        fusion:                   # settings under `decode` change decoding only
          plain: {}
          tuned: {decode: {search: beam, beam: 4, boost_weight: tuned}}

Cells whose training settings are equal share one model (trained once, loaded
once). A finished cell is a line of `grid.jsonl` with its resolved config; run
again, finished models and cells are kept, not recomputed, and a line torn by a
kill is dropped. Grid models train one after another (not side by side); with
the recipe's `parallel: P` above 1, the cells of each model are decoded and
scored P at a time, one thread each (tinyrnnt.lab.gridpool).
"""

from __future__ import annotations

import itertools
import json
import re
import sys
from dataclasses import dataclass, field
from pathlib import Path

from tinyrnnt import config as C

RESERVED = {"cell", "split", "model", "run_dir", "hyps", "checkpoint", "steps", "train_s", "limit", "decode",
            "decoding", "start", "model_config", "boost_weight", "n_utts", "decode_seconds", "wer", "cer", "uwer",
            "bwer", "recall", "precision", "false_trigger_rate"}  # keys of a result line
LIST_AXES = {"seed": "train.seed", "list_size": "evaluation list size"}  # axes given as plain lists of numbers


@dataclass
class GridPlan:
    axes: dict = field(default_factory=dict)  # axis -> {label: settings}, or a list for seed / list_size
    splits: tuple[str, ...] = ("test_unseen",)
    start_from: str = ""  # a recipe run every grid model starts from ("" = each trains from nothing)
    compare: dict = field(default_factory=dict)  # axis -> reference label

    def __post_init__(self):
        if not self.axes:
            raise C.ConfigError("grid.axes is empty; declare at least one axis (label -> settings)")
        for axis, values in self.axes.items():
            where = f"grid.axes.{axis}"
            if axis in LIST_AXES:
                if not isinstance(values, list) or not values or not all(isinstance(v, int) and v >= 0 for v in values):
                    raise C.ConfigError(f"{where}: expected a list of whole numbers >= 0 ({LIST_AXES[axis]}), "
                                        f"got {values!r}")
            elif not isinstance(values, dict) or not values or not all(isinstance(s, dict) for s in values.values()):
                raise C.ConfigError(f"{where}: expected a mapping label -> settings (e.g. none: {{}}), got {values!r}")
            else:
                odd = [k for k in values if isinstance(k, bool) or k is None]
                if odd:  # subtle: YAML reads on/off/yes/no as true/false and a bare ~ as null
                    raise C.ConfigError(f"{where}: label {odd[0]!r} is not a name (YAML reads on, off, yes and no "
                                        "as true or false); quote it, e.g. 'on': {...}")
                odd = [k for k in values if not re.fullmatch(r"[A-Za-z0-9_.+-]+", str(k))]
                if odd:  # labels name folders and cells ("axis=label,axis=label")
                    raise C.ConfigError(f"{where}: label {odd[0]!r} may hold only letters, digits and _ . + -")
            if not re.fullmatch(r"[A-Za-z0-9_]+", axis) or axis in RESERVED:
                raise C.ConfigError(f"grid.axes: axis name {axis!r} may hold only letters, digits and _, and may "
                                    f"not be one of {sorted(RESERVED)}")
        for axis, ref in self.compare.items():
            if axis not in self.axes or str(ref) not in map(str, self.axes[axis]):
                raise C.ConfigError(f"grid.compare.{axis}: expected an axis and one of its labels; axes: "
                                    f"{ {a: [str(x) for x in v] for a, v in self.axes.items()} }")

    def training_axes(self) -> list[str]:
        """Axes that change what is trained: seed, and any axis with settings outside `decode`."""
        return [a for a, v in self.axes.items() if a == "seed" or
                (isinstance(v, dict) and any(set(s) - {"decode"} for s in v.values()))]


@dataclass
class Cell:
    labels: dict  # axis -> label
    model: str  # id of the model it uses (its training labels)
    decode: dict  # decode.* settings of the cell
    list_size: int

    @property
    def id(self) -> str:
        return ",".join(f"{a}={v}" for a, v in self.labels.items())

    def decoding(self, plan: GridPlan) -> str:
        """File-name part of the cell's decoding labels ("plain" when no axis changes decoding)."""
        parts = [f"{a}-{v}" for a, v in self.labels.items() if a not in plan.training_axes() and a != "list_size"]
        return ".".join(parts) or "plain"


def expand(recipe, plan: GridPlan, overrides=()) -> tuple[list[Cell], dict]:
    """Every cell, in axis order, and {model id: ExperimentConfig} for the models they share."""
    from tinyrnnt.experiment import ExperimentConfig
    from tinyrnnt.lab.recipes import decode_settings

    axes = list(plan.axes.items())
    cells, models = [], {}
    for combo in itertools.product(*[list(v) for _, v in axes]):
        labels = {a: str(label) for (a, _), label in zip(axes, combo)}
        train_diff, decode, sets = {}, {}, []
        for (axis, values), label in zip(axes, combo):
            if axis == "seed":
                sets.append(f"train.seed={label}")
            elif axis != "list_size":
                own = values[label]
                train_diff = C._merge(train_diff, {k: v for k, v in own.items() if k != "decode"}, axis)
                decode.update(own.get("decode") or {})
        model = ",".join(f"{a}={labels[a]}" for a in plan.training_axes()) or "model"
        if model not in models:
            merged = C._merge(C._merge(C.to_dict(ExperimentConfig()), recipe.shared, "shared"), train_diff, "grid")
            merged.update(name=model, run_dir=str(Path(recipe.out_dir) / recipe.name / "grid" / slug(model)))
            cfg = C.from_dict(ExperimentConfig, merged, f"recipe {recipe.name}, grid model {model}")
            models[model] = C.apply_overrides(cfg, list(overrides) + sets)
        cell = Cell(labels, model, decode, int(labels.get("list_size", 0)))
        decode_settings(f"grid cell {cell.id}", decode)  # checked now, before any training
        cells.append(cell)
    return cells, models


def slug(text: str) -> str:
    """A folder name for a model id.

    >>> slug("biasing=trie_joiner,seed=0")
    'biasing-trie_joiner.seed-0'
    """
    return text.replace("=", "-").replace(",", ".")


def read_lines(path: Path) -> list[dict]:
    """The finished cells of a grid's JSON Lines file; a last line torn by a kill is dropped (and the
    file rewritten without it, so the next line appended starts clean)."""
    from tinyrnnt.lab.evaluate import write_atomic

    if not path.is_file():
        return []
    text = path.read_text(encoding="utf-8")
    lines, good = text.splitlines(), []
    for n, line in enumerate(lines, 1):
        try:
            good.append(json.loads(line))
        except json.JSONDecodeError:
            if n < len(lines) or text.endswith("\n"):
                raise C.ConfigError(f"{path}:{n}: not a JSON line; the grid's results file is damaged") from None
    if not text.endswith("\n") and text:
        write_atomic(path, "".join(json.dumps(g) + "\n" for g in good))
    return good


def cell_decode(cfg, cell: Cell):
    """The cell's decode settings on top of its model's (boost weight 1 standing in for "tuned"), and
    whether its boost weight is to be tuned."""
    from tinyrnnt.lab.recipes import decode_settings

    settings, tuned = decode_settings(cell.id, cell.decode)
    return C.apply_overrides(cfg.decode, [f"{k}={json.dumps(v)}" for k, v in settings.items()]), tuned


def run_cell(model, cfg, dcfg, cell: Cell, split: str, plan: GridPlan, limit: int, facts: dict,
             progress: bool | str = False) -> dict:
    """Decode and score one cell on one split, save its hypotheses in its model's results folder,
    and return its line for grid.jsonl (facts: model, checkpoint, history, start, config)."""
    from tinyrnnt.bias.spotting import can_spot
    from tinyrnnt.data import CorpusSplit
    from tinyrnnt.lab.evaluate import evaluate, save_results
    from tinyrnnt.lab.tables import TABLE_KEYS

    records, summary = evaluate(model, CorpusSplit(cfg.data.corpus, split), list_size=cell.list_size,
                                max_symbols=dcfg.max_symbols, limit=limit or None,
                                search=dcfg.search, beam=dcfg.beam, boost=dcfg.boost(),
                                progress=progress, sounds_like=dcfg.sounds_like,
                                spotting=dcfg.spotting and can_spot(model))
    name = f"grid.{cell.decoding(plan)}.{split}.n{cell.list_size}"
    save_results(Path(cfg.run_dir) / "results", name, records, summary)
    history = facts["history"]
    return {"cell": cell.id, "split": split, **cell.labels, "model": facts["model"], "run_dir": cfg.run_dir,
            "hyps": name, "checkpoint": facts["checkpoint"], "steps": history["steps"],
            "train_s": round(history["seconds"], 1), "limit": limit,
            "decode": C.to_dict(dcfg), "boost_weight": dcfg.boost_weight, "n_utts": summary["n_utts"],
            "decode_seconds": summary["decode_seconds"], **{k: summary.get(k) for k in TABLE_KEYS},
            "decoding": cell.decode, "start": facts["start"], "model_config": facts["config"]}


def run_grid(recipe, overrides=(), quiet: bool = False) -> dict:
    """Train, decode and score every cell not already in grid.jsonl; returns counts of what it did."""
    from tinyrnnt.lab.gridtables import tuned_weight, write_grid_tables
    from tinyrnnt.lab.recipes import EvalPlan, _train_one, _training_part, check_plan, ensure_corpus, run_config
    from tinyrnnt.lab.train import load_model, read_history

    plan = C.from_dict(GridPlan, recipe.grid, "grid")
    if plan.start_from and plan.start_from not in recipe.runs:
        raise C.ConfigError(f"grid.start_from: {plan.start_from!r} is not a run of the recipe; "
                            f"runs: {list(recipe.runs)}")
    if tuple(recipe.evaluate.tune.model_scales) != (1.0,):  # before any training, not at the first tuning
        raise C.ConfigError("evaluate.tune.model_scales: grids tune the boost weight only; leave it at [1] "
                            "and put decode.model_boost_scale on a grid axis instead")
    cells, models = expand(recipe, plan, overrides)
    folder = Path(recipe.out_dir) / recipe.name
    lines_path = folder / "grid.jsonl"
    done = {(g["cell"], g["split"]): g for g in read_lines(lines_path)}
    for cfg in {m.data.corpus: m for m in models.values()}.values():
        ensure_corpus(cfg, quiet)
        check_plan(EvalPlan(splits=tuple(plan.splits), list_sizes=tuple({c.list_size for c in cells})), cfg.data.corpus)
    start = start_history = None  # the start's history: a start trained again makes every cell stale
    if plan.start_from:
        start = _train_one(run_config(recipe, plan.start_from, overrides), quiet, resume=True)["last_checkpoint"]
        start_history = read_history(start)
    say = (lambda text: None) if quiet else (lambda text: print(text, file=sys.stderr, flush=True))  # noqa: E731
    stats, total = {"trained": 0, "evaluated": 0, "kept": 0}, len(cells) * len(plan.splits)
    count = 0
    pool = None  # parallel > 1: a pool of one-thread workers, started for the first cells to evaluate

    def append(line: dict) -> None:  # only this process writes the file: one whole line per write
        with lines_path.open("a", encoding="utf-8") as f:
            f.write(json.dumps(line) + "\n")
        done[(line["cell"], line["split"])] = line
        stats["evaluated"] += 1

    try:
        for model_id, cfg in models.items():
            if start is not None:
                cfg = C.apply_overrides(cfg, [f"train.init_from={start}"])
            mine = [c for c in cells if c.model == model_id]
            config = C.to_dict(cfg)
            same = {"model_config": config, "limit": recipe.evaluate.limit, "start": start_history}
            todo = [(c, s) for c in mine for s in plan.splits
                    if {k: done.get((c.id, s), {}).get(k) for k in same} != same
                    or done[(c.id, s)].get("decoding") != c.decode]
            stats["kept"] += len(mine) * len(plan.splits) - len(todo)
            count += len(mine) * len(plan.splits) - len(todo)
            if not todo:
                continue
            marker = Path(cfg.run_dir) / "trained.json"
            already = marker.is_file() and _training_part(json.loads(marker.read_text(encoding="utf-8"))["config"]) \
                == _training_part(config)
            trained = _train_one(cfg, quiet, resume=True)
            stats["trained"] += not already
            ckpt = trained[f"{recipe.evaluate.checkpoint}_checkpoint"]
            facts = {"model": model_id, "checkpoint": ckpt, "history": read_history(ckpt), "start": start_history,
                     "config": config}
            if recipe.parallel > 1:
                from tinyrnnt.lab.gridpool import evaluate_cells, start_pool

                pool = pool or start_pool(recipe.parallel)
                count = evaluate_cells(pool, todo, cfg, facts, plan, recipe.evaluate, append, say, count, total)
                continue
            model, weights = load_model(ckpt)[0], {}
            for cell, split in todo:
                count += 1
                dcfg, tuned = cell_decode(cfg, cell)
                if tuned:
                    variant = cell.decoding(plan)
                    if variant not in weights:
                        weights[variant] = tuned_weight(model, cfg, dcfg, recipe.evaluate, variant, say)
                    dcfg = C.apply_overrides(dcfg, [f"boost_weight={weights[variant]}"])
                say(f"[{count}/{total}] {cell.id} on {split}")
                append(run_cell(model, cfg, dcfg, cell, split, plan, recipe.evaluate.limit, facts,
                                progress=False if quiet else f"{cell.id} {split}"))
    except BaseException:
        if pool is not None:
            from tinyrnnt.lab.armtraining import stop_pool

            stop_pool(pool)
        raise
    if pool is not None:
        pool.shutdown()
    tables = write_grid_tables(folder, plan, [done[(c.id, s)] for c in cells for s in plan.splits])
    if not quiet:
        print(tables["markdown"])
    say(f"grid: {stats['evaluated']} cells evaluated, {stats['kept']} kept from before, "
        f"{stats['trained']} models trained; results in {lines_path}")
    return dict(stats, **tables)
