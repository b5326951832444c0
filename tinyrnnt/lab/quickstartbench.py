"""The `quickstart` benchmark: the README's main job from nothing, bf16 against fp32, and what each
biasing input adds to a training step.

1. `tinyrnnt experiment --recipe quickstart` in a fresh, empty folder, as a new user runs it (a
   new process: no warm caches, the corpus built from nothing), timed whole and by stage (corpus,
   training, evaluation and report), with its headline: B-WER of the trie cue against the plain
   baseline and against its equal-steps control at N = 100, with the paired-bootstrap interval.
2. Training precision: the same short baseline run (same seed, same steps) in fp32 and in bf16
   autocast, where the CPU has bfloat16 matrix units; steps per second and valid CER of each.
3. The biased training step's cost: one training step (forward, backward, optimiser) of each
   biasing input against the plain model's, on the same batches with lists of N = 100.
"""

from __future__ import annotations

import json
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

STEP_KINDS = {  # biasing input -> its settings (the quickstart's trie arm; attention as in full_ablation)
    "trie": ["bias.kind=trie", "bias.inject=both", "bias.cue_dim=128", "bias.token_boost=true", "bias.boost_mode=mix_heard"],
    "attention": ["bias.kind=attention", "bias.options={dim: 64, phrase_gate: all}"],
    "trie+attention": ["bias.kind=trie+attention", "bias.inject=both", "bias.cue_dim=128", "bias.token_boost=true",
                       "bias.boost_mode=mix_heard", "bias.options={dim: 64, phrase_gate: all}"],
}


def _log(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


def run_quickstart(work: Path, settings: tuple[str, ...] = (), corpus: Path | None = None) -> dict:
    """The quickstart recipe from nothing in `work`; its time, stages and headline. `settings`:
    recipe settings given on its command line (tests shrink it); `corpus`: where they put the corpus
    (default: the recipe's own, corpora/default in `work`)."""
    work.mkdir(parents=True, exist_ok=True)
    log = work / "quickstart.log"
    t0, started = time.perf_counter(), time.time()
    with log.open("w", encoding="utf-8") as f:
        done = subprocess.run([sys.executable, "-m", "tinyrnnt", "experiment", "--recipe", "quickstart", *settings],
                              cwd=work, stdout=f, stderr=subprocess.STDOUT)
    total = time.perf_counter() - t0
    if done.returncode != 0:
        raise SystemExit(f"error: the quickstart failed (exit {done.returncode}); its output is in {log}")
    folder = work / "runs" / "quickstart"
    # stages by the wall clock: the corpus is whole when its build.json is written, training ends with
    # the last arm's trained.json; evaluation and the report take the rest
    corpus_end = ((corpus or work / "corpora" / "default") / "build.json").stat().st_mtime - started
    training_end = max(p.stat().st_mtime for p in folder.glob("*/trained.json")) - started
    rows = json.loads((folder / "results.json").read_text())
    comparisons = json.loads((folder / "comparisons.json").read_text())

    def bwer(run):
        return next(r["bwer"] for r in rows if r["run"] == run and r["list_size"] == 100)

    def against(role):
        return next(c for c in comparisons if c["system"] == "trie" and c["role"] == role and c["metric"] == "bwer"
                    and c["list_size"] == 100)

    start, control = against("start"), against("control")
    return {
        "quickstart_s": round(total, 1),
        "quickstart_stages_s": {"start_and_corpus": round(max(corpus_end, 0.0), 1),
                                "training": round(training_end - max(corpus_end, 0.0), 1),
                                "evaluation_and_report": round(total - training_end, 1)},
        "bwer_baseline_n100": bwer("baseline"), "bwer_control_n100": bwer("trie_control"),
        "bwer_trie_n100": bwer("trie"),
        "bwer_delta_ci_low": start["low"], "bwer_delta_ci_high": start["high"],
        "prob_improvement": start["p_improvement"],
        "bwer_delta_vs_control_ci_low": control["low"], "bwer_delta_vs_control_ci_high": control["high"],
        "prob_improvement_vs_control": control["p_improvement"],
        "train_steps": {r["run"]: r["steps"] for r in rows if r["list_size"] == 100},
        "report_path": str(folder / "report" / "report.html"),
    }


def precision_runs(corpus: str, work: Path, steps: int) -> dict:
    """The same short baseline run in fp32 and bf16: steps per second, valid CER at equal steps."""
    from tinyrnnt import config as C
    from tinyrnnt.data import CorpusSplit
    from tinyrnnt.experiment import ExperimentConfig
    from tinyrnnt.lab.evaluate import evaluate
    from tinyrnnt.lab.train import load_model, train
    from tinyrnnt.model.training import cpu_has_bf16_units

    if not cpu_has_bf16_units():
        return {"bf16_speedup": None, "bf16_cer_diff": None, "bf16_note": "no bfloat16 matrix units on this CPU"}
    out = {}
    for precision in ("fp32", "bf16"):
        cfg = C.apply_overrides(ExperimentConfig(), [
            f"data.corpus={corpus}", f"run_dir={work / ('precision_' + precision)}", f"train.steps={steps}",
            "train.minutes=0", "train.threads=2", f"train.validate_every_steps={steps}", "train.snapshot_minutes=0",
            f"train.precision={precision}"])
        result = train(cfg, quiet=True)
        _, summary = evaluate(load_model(result.last_checkpoint)[0], CorpusSplit(corpus, "valid"))
        out[precision] = {"steps_per_s": round(result.steps / result.train_seconds, 3), "valid_cer": summary["cer"],
                          "train_s": round(result.train_seconds, 1)}
        _log(f"{precision}: {out[precision]['steps_per_s']} steps/s, valid CER {summary['cer']:.4f} after {steps} steps")
    return {"bf16_speedup": round(out["bf16"]["steps_per_s"] / out["fp32"]["steps_per_s"], 3),
            "bf16_cer_diff": round(out["bf16"]["valid_cer"] - out["fp32"]["valid_cer"], 4),
            "precision_runs": out, "precision_steps": steps}


def step_costs(corpus: str, batch_size: int = 16, repeats: int = 5, list_size: int = 100) -> dict:
    """Median training step (ms, 2 threads) of the plain model and each biasing input, on the same
    batch of training-length utterances with lists of `list_size`; and each against the plain step.
    The kinds take turns, one step each per round, so a machine that speeds up or slows down
    during the measurement moves all of them alike."""
    import torch

    from tinyrnnt import config as C
    from tinyrnnt.data import CorpusSplit, collate
    from tinyrnnt.experiment import ExperimentConfig
    from tinyrnnt.lab.cost import timing_list
    from tinyrnnt.model.transducer import Transducer

    torch.set_num_threads(2)
    split = CorpusSplit(corpus, "test_unseen")
    batch = collate([{**split[i], "list": timing_list(split, i, list_size)} for i in range(batch_size)])
    models = {}
    for kind, settings in {"none": [], **STEP_KINDS}.items():
        torch.manual_seed(0)
        cfg = C.apply_overrides(ExperimentConfig(), [f"data.corpus={corpus}", *settings])
        model = Transducer(cfg.model, cfg.bias if cfg.bias.kind != "none" else None)
        model.train()
        models[kind] = (model, torch.optim.Adam(model.parameters(), lr=1e-5))
    spent: dict[str, list[float]] = {kind: [] for kind in models}
    for k in range(repeats + 1):  # the first round is the warm-up
        for kind, (model, optimiser) in models.items():
            t0 = time.perf_counter()
            optimiser.zero_grad()
            lists = batch["lists"] if model.bias is not None else None
            model.losses(batch["feats"], batch["feat_lens"], batch["targets"], batch["target_lens"], lists)["loss"].backward()
            optimiser.step()
            if k:
                spent[kind].append(time.perf_counter() - t0)
    ms = {kind: round(1000 * statistics.median(times), 1) for kind, times in spent.items()}
    for kind in ms:
        _log(f"training step, {kind}: {ms[kind]} ms (batch of {batch_size}, N = {list_size}, 2 threads)")
    return {"train_step_ms": ms, "step_cost_ratios": {k: round(v / ms["none"], 3) for k, v in ms.items() if k != "none"}}


def run_quickstart_bench(args) -> dict:
    t_start = time.perf_counter()
    work = Path(args.work) if args.work else Path(tempfile.mkdtemp(prefix="tinyrnnt-quickstart-"))
    if work.exists() and any(work.iterdir()):
        raise SystemExit(f"error: --work {work} is not empty; the quickstart is timed from nothing in an empty folder")
    _log(f"quickstart from nothing in {work} ...")
    out = run_quickstart(work)
    _log(f"quickstart: {out['quickstart_s']} s {out['quickstart_stages_s']}")
    corpus = str(work / "corpora" / "default")
    out.update(precision_runs(corpus, work / "precision", steps=args.precision_steps))
    costs = step_costs(corpus)
    out.update(costs)
    out["biased_step_cost_ratio"] = costs["step_cost_ratios"]["trie"]
    out["work"] = str(work)
    out["bench_wall_s"] = round(time.perf_counter() - t_start, 1)
    return out
