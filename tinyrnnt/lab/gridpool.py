"""A grid's cells evaluated side by side: a pool of `parallel` worker processes, one torch thread
each (recipe setting `parallel`; 1 keeps the serial loop of tinyrnnt.lab.grid).

Per model, the boost weights tuned on the tuning split are tuned first, once per
decoding (the cells that need one wait for it; the others start at once); then
every cell is decoded and scored in a worker, which also writes its hypotheses
into the model's results folder. Only the parent appends to grid.jsonl, one
whole line per finished cell, in the order cells finish: a kill loses only the
cells in flight. Numbers are those of the serial run: the same model, the same
settings, the same code (tinyrnnt.lab.grid.run_cell).
"""

from __future__ import annotations

import contextlib
import io

_CACHE: dict = {}  # worker: (checkpoint path, file time) -> model; one model kept, cells come model by model


def _one_thread() -> None:  # worker start-up
    import torch

    torch.set_num_threads(1)


def _model(ckpt: str):
    import os

    from tinyrnnt.lab.train import load_model

    key = (ckpt, os.stat(ckpt).st_mtime_ns)
    if key not in _CACHE:
        _CACHE.clear()
        _CACHE[key] = load_model(ckpt)[0]
    return _CACHE[key]


def _tune(ckpt: str, cfg, dcfg, evaluate_plan, variant: str) -> float:
    """Worker: the boost weight of one decoding of one model (its sweep's progress line silenced)."""
    from tinyrnnt.lab.gridtables import tuned_weight

    with contextlib.redirect_stderr(io.StringIO()):
        return tuned_weight(_model(ckpt), cfg, dcfg, evaluate_plan, variant, lambda text: None)


def _cell(ckpt: str, cfg, dcfg, cell, split: str, plan, limit: int, facts: dict) -> dict:
    """Worker: one cell on one split; its line for grid.jsonl."""
    from tinyrnnt.lab.grid import run_cell

    return run_cell(_model(ckpt), cfg, dcfg, cell, split, plan, limit, facts, progress=False)


def start_pool(parallel: int):
    import multiprocessing as mp
    from concurrent.futures import ProcessPoolExecutor

    return ProcessPoolExecutor(max_workers=parallel, mp_context=mp.get_context("spawn"), initializer=_one_thread)


def evaluate_cells(pool, todo: list, cfg, facts: dict, plan, evaluate_plan, append, say, count: int,
                   total: int) -> int:
    """Every (cell, split) of `todo` (cells of one model) evaluated in the pool; `append(line)` called
    in this process for each finished cell. Returns the progress count after them."""
    import time
    from concurrent.futures import FIRST_COMPLETED, wait

    from tinyrnnt import config as C
    from tinyrnnt.lab.grid import cell_decode

    ckpt, limit, started = facts["checkpoint"], evaluate_plan.limit, time.perf_counter()
    running, waiting = {}, {}  # future -> what it computes; tuned decoding -> cells waiting for its weight

    def submit(cell, split, dcfg):
        running[pool.submit(_cell, ckpt, cfg, dcfg, cell, split, plan, limit, facts)] = ("cell", cell, split)

    for cell, split in todo:  # tuning first: it is the longest job and cells wait for it
        dcfg, tuned = cell_decode(cfg, cell)
        if tuned:
            variant = cell.decoding(plan)
            if variant not in waiting:
                waiting[variant] = []
                running[pool.submit(_tune, ckpt, cfg, dcfg, evaluate_plan, variant)] = ("tune", variant, dcfg)
            waiting[variant].append((cell, split, dcfg))
    for cell, split in todo:
        dcfg, tuned = cell_decode(cfg, cell)
        if not tuned:
            submit(cell, split, dcfg)
    say(f"{facts['model']}: {len(todo)} cells, evaluated side by side"
        + (f" (tuning {len(waiting)} boost weight(s) first)" if waiting else ""))
    while running:
        finished, _ = wait(running, return_when=FIRST_COMPLETED)
        for future in finished:
            kind, *what = running.pop(future)
            if kind == "tune":
                variant, _ = what
                weight = future.result()
                say(f"{cfg.name} {variant}: boost weight {weight:g} chosen on {evaluate_plan.tune.split}")
                for cell, split, dcfg in waiting.pop(variant):
                    submit(cell, split, C.apply_overrides(dcfg, [f"boost_weight={weight}"]))
                continue
            cell, split = what
            line = future.result()
            append(line)
            count += 1
            left = total - count
            wer = "-" if line["wer"] is None else f"{line['wer']:.3f}"
            say(f"[{count}/{total}] {cell.id} on {split}: WER {wer} "
                f"({time.perf_counter() - started:.0f} s for this model; {left} cell(s) left in the grid)")
    return count
