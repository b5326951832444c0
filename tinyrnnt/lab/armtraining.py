"""Training a recipe's arms: one at a time, or several side by side in a process pool; a finished
arm leaves trained.json in its run folder and is kept on --resume. Helpers of tinyrnnt.lab.recipes."""

from __future__ import annotations

import sys
from pathlib import Path
from typing import TYPE_CHECKING

from tinyrnnt import config as C
from tinyrnnt.experiment import ExperimentConfig

if TYPE_CHECKING:
    from tinyrnnt.lab.recipes import Arm


def _training_part(config: dict) -> dict:
    """A saved config without its decoding settings, which do not change what is trained (settings
    added since it was saved read as their defaults)."""
    from tinyrnnt.experiment import with_defaults

    return {k: v for k, v in with_defaults(config).items() if k != "decode"}


def _saved_settings_match(saved: Path, cfg: ExperimentConfig) -> bool:
    """Does the config saved in a run folder train what `cfg` trains? Decoding settings aside;
    paths compared once resolved; settings added since it was saved take their defaults."""
    import dataclasses

    if not saved.is_file():
        return False
    try:
        old = C.load(ExperimentConfig, saved)
    except (C.ConfigError, OSError):
        return False

    def norm(c: ExperimentConfig) -> dict:
        plain = dataclasses.replace(c, run_dir="", data=dataclasses.replace(c.data, corpus=""),
                                    train=dataclasses.replace(c.train, init_from=""))
        paths = [str(Path(p).resolve()) if p else "" for p in (c.run_dir, c.data.corpus, c.train.init_from)]
        return {**_training_part(C.to_dict(plain)), "paths": paths}

    return norm(old) == norm(cfg)


def _train_one(cfg: ExperimentConfig, quiet: bool, resume: bool = False) -> dict:
    """Train one arm; a finished arm leaves `trained.json` (its config and result) in its run folder.

    With resume, an arm whose trained.json matches its config is not trained again, and an arm
    interrupted after a checkpoint continues from its last.ckpt.
    """
    import json

    from tinyrnnt.lab.evaluate import write_atomic
    from tinyrnnt.lab.train import train

    marker = Path(cfg.run_dir) / "trained.json"
    if resume and marker.is_file():
        done = json.loads(marker.read_text(encoding="utf-8"))
        if _training_part(done["config"]) == _training_part(C.to_dict(cfg)):
            if not quiet:
                print(f"{cfg.run_dir}: already trained, kept", file=sys.stderr)
            return done["result"]
    again = resume and (Path(cfg.run_dir) / "checkpoints" / "last.ckpt").is_file()
    if again and marker.is_file() or again and not _saved_settings_match(Path(cfg.run_dir) / "config.yaml", cfg):
        # subtle: a checkpoint of other settings (a finished run of an older recipe, say) is not
        # continued: it would pass for a run of these settings. Train anew; train() keeps the
        # earlier checkpoints one generation back.
        print(f"{cfg.run_dir}: trained with other settings; training anew", file=sys.stderr)
        again = False
    r = train(cfg, quiet=quiet, resume=again)
    result = {"best_checkpoint": str(r.best_checkpoint), "last_checkpoint": str(r.last_checkpoint),
              "train_seconds": r.train_seconds, "steps": r.steps, "history": r.history}
    write_atomic(marker, json.dumps({"config": C.to_dict(cfg), "result": result}, indent=1) + "\n")
    return result


def train_arms(arms: dict[str, Arm], parallel: int, quiet: bool, resume: bool = False) -> dict[str, dict]:
    """Train every arm, each once its source has finished; with parallel > 1, that many at once.

    On 2 cores two one-thread runs side by side finish sooner than the same runs
    one after the other with two threads each (measured: a second thread buys ~1.3x).
    An arm that starts from another takes that arm's *last* checkpoint, so its
    history counts exactly the steps of its source.
    """
    def ready_config(arm: Arm, done: dict) -> ExperimentConfig:
        if arm.source is None:
            return arm.cfg
        return C.apply_overrides(arm.cfg, [f"train.init_from={done[arm.source]['last_checkpoint']}"])

    done: dict[str, dict] = {}
    if parallel <= 1 or len(arms) == 1:
        for key, arm in arms.items():
            done[key] = _train_one(ready_config(arm, done), quiet, resume)
        return done
    import multiprocessing as mp
    from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait

    pending = dict(arms)
    budget = max(parallel, *(arm.cfg.train.threads for arm in arms.values()))
    with ProcessPoolExecutor(max_workers=parallel, mp_context=mp.get_context("spawn")) as pool:
        try:
            running = {}
            while pending or running:
                for key in [k for k, a in pending.items() if a.source is None or a.source in done]:
                    threads = [arms[k].cfg.train.threads for k in running.values()]
                    if fits(threads, pending[key].cfg.train.threads, parallel, budget):
                        running[pool.submit(_train_one, ready_config(pending.pop(key), done), True, resume)] = key
                finished, _ = wait(running, return_when=FIRST_COMPLETED)
                for f in finished:
                    done[running.pop(f)] = f.result()
        except BaseException:  # Their checkpoints are written whole, so --resume continues where they stood.
            stop_pool(pool)
            raise
    return {key: done[key] for key in arms}



def fits(running_threads: list[int], threads: int, parallel: int, budget: int) -> bool:
    """May an arm of `threads` threads start beside running arms of `running_threads`?

    At most `parallel` arms at once, and their threads at most `budget` (the larger of `parallel`
    and the most threads any arm asks for), so arms of several threads run alone rather than
    side by side. subtle: two 2-thread trainings on 2 cores ran about 8x slower each than one
    alone (measured: a three-seed trie benchmark, its baselines side by side); threads are never
    changed to fit, since results may depend on them, only the order of starting.

    >>> fits([], 2, parallel=2, budget=2), fits([2], 1, parallel=2, budget=2), fits([1], 1, parallel=2, budget=2)
    (True, False, True)
    """
    return len(running_threads) < parallel and (not running_threads or sum(running_threads) + threads <= budget)


def stop_pool(pool) -> None:
    """Kill a process pool's workers now and drop its queued work (ctrl-c, SIGTERM, an error).

    subtle: a signal sent to this process alone (SIGTERM from a job scheduler, say) never reaches the
    workers, and leaving the pool waits for them to finish what they run; so they are killed.
    """
    for proc in list((getattr(pool, "_processes", None) or {}).values()):
        proc.kill()
    pool.shutdown(wait=False, cancel_futures=True)
