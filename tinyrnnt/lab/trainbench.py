"""The `train` benchmark: throughput, FLOP utilisation, loss timing, RTF, memory, CER curve."""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

import torch

from tinyrnnt import config as C
from tinyrnnt.data import CorpusSplit
from tinyrnnt.experiment import ExperimentConfig
from tinyrnnt.lab.evaluate import evaluate, exposure_recall, write_atomic
from tinyrnnt.runtime import peak_rss_mb


def _log(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


def cer_curve(cfg: ExperimentConfig, snapshots, split: CorpusSplit) -> list[dict]:
    """CER on `split` of each weight snapshot (training minutes -> CER)."""
    from tinyrnnt.model.transducer import Transducer

    model = Transducer(cfg.model)
    curve = []
    for seconds, state in snapshots:
        model.load_state_dict(state)
        _, summary = evaluate(model, split, max_symbols=cfg.decode.max_symbols)
        curve.append({"minutes": round(seconds / 60, 2), "cer": summary["cer"], "wer": summary["wer"]})
        _log(f"  {seconds / 60:5.1f} min  CER {summary['cer']:.4f}  WER {summary['wer']:.4f}")
    return curve


def run_train_bench(args) -> dict:
    from tinyrnnt.bench import model_shape_gflops, sgemm_gflops
    from tinyrnnt.lab.recipes import ensure_corpus
    from tinyrnnt.lab.train import load_model, train
    from tinyrnnt.model.loss import time_losses

    run_dir = Path(args.run_dir)
    cfg = C.apply_overrides(ExperimentConfig(), [f"run_dir={run_dir}", f"data.corpus={args.corpus}",
                                                 f"train.minutes={args.minutes}", "train.threads=2"])
    sgemm = sgemm_gflops(threads=2)
    at_shapes = model_shape_gflops(cfg.model, threads=2, batch=cfg.data.batch_size)
    losses = time_losses()
    _log(f"steady sgemm peak (2 threads) at 2048^2: {sgemm:.1f} GFLOP/s; at the model's shapes: {at_shapes}; "
         f"loss ms ours {losses['loss_ms_ours']:.1f}, torchaudio {losses['loss_ms_torchaudio']:.1f}")
    ensure_corpus(cfg, build=True)
    facts_path = run_dir / "bench.json"
    if args.fresh or not facts_path.is_file():
        t0 = time.perf_counter()
        result = train(cfg, quiet=True)
        wall = time.perf_counter() - t0
        clock = result.clock
        test = CorpusSplit(cfg.data.corpus, "test")
        _log("CER curve on the test split:")
        curve = cer_curve(cfg, result.snapshots, test)
        facts = {
            "train_seconds": round(result.train_seconds, 1),
            "train_wall_seconds": round(wall, 1),
            "steps": result.steps,
            "train_utt_per_s": round(clock.utterances / result.train_seconds, 1),
            "train_frames_per_s": round(clock.frames / result.train_seconds),
            "train_gflops": round(clock.flops / result.train_seconds / 1e9, 2),
            "peak_rss_mb": round(peak_rss_mb(), 1),
            "curve": curve,
            "best_checkpoint": str(result.best_checkpoint),
        }
        write_atomic(facts_path, json.dumps(facts, indent=1) + "\n")
    else:
        facts = json.loads(facts_path.read_text())
        _log(f"{facts_path} exists: quoting that training run (use --fresh to train again)")

    model, mcfg, _ = load_model(facts["best_checkpoint"])
    torch.set_num_threads(1)
    test = CorpusSplit(cfg.data.corpus, "test")
    _, summary = evaluate(model, test, max_symbols=mcfg.decode.max_symbols)
    one = CorpusSplit(cfg.data.corpus, "test", limit=100)
    _, single = evaluate(model, one, batch_size=1, max_symbols=mcfg.decode.max_symbols)
    unseen = CorpusSplit(cfg.data.corpus, "test_unseen")
    records, unseen_summary = evaluate(model, unseen, max_symbols=mcfg.decode.max_symbols)
    torch.set_num_threads(2)
    unseen_name_recall = exposure_recall(records, cls="invented_name").get("rare_recall:unseen", 0.0)
    curve = facts["curve"]
    at5 = [p["cer"] for p in curve if p["minutes"] <= 5.0 + 1e-6]
    reach = [p["minutes"] for p in curve if p["cer"] is not None and p["cer"] <= 0.10]
    return {
        "train_utt_per_s": facts["train_utt_per_s"],
        "train_frames_per_s": facts["train_frames_per_s"],
        "train_gflops": facts["train_gflops"],
        "sgemm_gflops": round(sgemm, 1),
        "flop_utilisation": round(facts["train_gflops"] / sgemm, 3),
        "model_shape_gflops": at_shapes,  # the same steady peak at the products the model runs
        "loss_ms_ours": round(losses["loss_ms_ours"], 2),
        "loss_ms_torchaudio": round(losses["loss_ms_torchaudio"], 2),
        "loss_max_abs_diff": losses.get("max_abs_diff"),
        "greedy_rtf_1thread": round(summary["rtf"], 5),
        "greedy_rtf_1thread_batch1": round(single["rtf"], 5),
        "peak_rss_mb": facts["peak_rss_mb"],
        "cer_at_5min": at5[-1] if at5 else None,
        "minutes_to_cer_10": reach[0] if reach else None,
        "test_cer": summary["cer"],
        "test_wer": summary["wer"],
        "test_unseen_cer": unseen_summary["cer"],
        "unseen_name_recall": round(unseen_name_recall, 4),
        "train_seconds": facts["train_seconds"],
        "curve": [(p["minutes"], p["cer"]) for p in curve],
    }
