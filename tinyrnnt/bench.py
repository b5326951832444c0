"""Benchmarks: `python -m tinyrnnt.bench NAME` prints figures, the last line one JSON object.

    corpus   synthesis speed, default corpus build time and size, homophone share, determinism
    train    training throughput and FLOP utilisation, loss timing, greedy RTF, memory, CER curve
    trie     trie-based deep biasing vs its equal-steps control arm and the baseline: B-WER, U-WER,
             held-out name style, sound-alike false triggers, determinism, cue cost, recipe time
    fusion   beam search and shallow-fusion boosting (tuned on valid), alone and with the trie cue;
             after-trigger boosting, RTF, and our beam search against torchaudio's RNNTBeamSearch
    attention  attention over the list and trie + attention against the trie cue and the shared
             control (B-WER, recall at N = 100); training step and decoding time per utterance at
             N = 10..5000 on one thread for no biasing, trie, attention, both and shallow fusion,
             peak memory at N = 5000, RTF, a table and a plot
    faults   the bad-input catalogue, a killed-and-resumed training, a 100,000-entry list, a wheel install
    audio    formant-synthesizer and feature speed on one core, the feature cache (no audio read while
             training), 2-process distributed training agreeing on weights, the outside-voice corpus
    quickstart  the README's main job from nothing in an empty folder, timed by stage, with its
             headline interval; bf16 against fp32 training (speed, valid CER at equal steps); each
             biasing input's training step against the plain one

Each builds what it needs (corpus, checkpoints) when missing. Rates are
fractions, times in seconds unless the key says ms.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

from tinyrnnt.runtime import peak_rss_mb


def _log(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


def folder_digest(folder: Path) -> str:
    h = hashlib.sha256()
    for p in sorted(folder.iterdir()):
        if p.name == "build.json":  # the build time, the one file that may differ
            continue
        h.update(p.name.encode())
        h.update(hashlib.sha256(p.read_bytes()).digest())
    return h.hexdigest()


def synth_speed(n_utts: int = 2000, seed: int = 0) -> float:
    """Utterances per second of the acoustic renderer on one core (default text and speakers)."""
    import numpy as np

    from tinyrnnt.synth.acoustics import Renderer, make_speakers
    from tinyrnnt.synth.corpus import CorpusConfig, make_text

    cfg = CorpusConfig(seed=seed)
    _, _, splits = make_text(cfg)
    speakers = make_speakers(50, np.random.default_rng(seed), cfg.acoustics)
    renderer = Renderer(cfg.acoustics, speakers)
    phones = [s.phones for s in splits["train"][:n_utts]]
    ids = [i % len(speakers) for i in range(len(phones))]
    renderer.render(phones[:50], ids[:50], np.random.default_rng(1))  # warm-up
    t0 = time.perf_counter()
    feats, _ = renderer.render(phones, ids, np.random.default_rng(2))
    dt = time.perf_counter() - t0
    _log(f"rendered {len(feats)} utterances, mean {np.mean([len(f) for f in feats]) / 100:.2f} s, in {dt:.2f} s")
    return len(feats) / dt


def bench_corpus(args) -> dict:
    from tinyrnnt.synth.corpus import CorpusConfig, build_corpus

    os.environ.setdefault("OMP_NUM_THREADS", "1")
    speed = synth_speed()
    out = Path(args.corpus)
    card_path = out / "card.json"
    if args.rebuild or not card_path.is_file():
        t0 = time.perf_counter()
        card = build_corpus(CorpusConfig(), out, overwrite=args.rebuild, quiet=False)
        build_s = time.perf_counter() - t0
    else:
        card = json.loads(card_path.read_text())
        build_s = json.loads((out / "build.json").read_text())["build_seconds"]
        _log(f"{out} exists; its recorded build time is quoted (use --rebuild to measure again)")
    from tinyrnnt.synth.sentences import TextConfig

    small = dict(train_utts=300, valid_utts=40, test_utts=40, test_unseen_utts=40, max_list_size=500,
                 list_sizes=(0, 10, 100, 500), text=TextConfig(n_invented_names=800, n_compounds=200, few_shot_share=0.03,
                                                      extra_styles={"fell": 100, "reed": 60}))
    with tempfile.TemporaryDirectory() as tmp:
        for name, seed in (("a", 7), ("b", 7), ("c", 8)):
            build_corpus(CorpusConfig(seed=seed, **small), Path(tmp) / name, quiet=True)
        da, db, dc = (folder_digest(Path(tmp) / x) for x in "abc")
    return {
        "synth_utt_per_s_1core": round(speed, 1),
        "default_corpus_build_s": round(build_s, 1),
        "default_corpus_mb": card["size_mb"],
        "name_homophone_share": card["inventory"]["name_homophone_share"],
        "same_seed_same_bytes": da == db,
        "different_seed_different_bytes": da != dc,
        "train_hours": card["splits"]["train"]["hours"],
    }


def sgemm_gflops(threads: int, n: int = 2048, blocks: int = 5, m: int | None = None, k: int | None = None) -> float:
    """Steady single-precision matrix-multiply rate, GFLOP/s: (m x k) @ (k x n), m and k = n unless
    given; the best of `blocks` timed blocks (each at least 0.1 s) after a warm-up, so one slow
    block (another process, a frequency step) does not set the peak."""
    import torch

    torch.set_num_threads(threads)
    m, k = m or n, k or n
    a, b = torch.randn(m, k), torch.randn(k, n)
    flops = 2 * m * k * n
    t0, repeats = time.perf_counter(), 0
    while time.perf_counter() - t0 < 0.05 or repeats < 2:  # warm-up, and how many make 0.1 s
        a @ b
        repeats += 1
    repeats = max(1, int(repeats * 0.1 / max(time.perf_counter() - t0, 1e-9)))
    best = 0.0
    for _ in range(blocks):
        t0 = time.perf_counter()
        for _ in range(repeats):
            a @ b
        best = max(best, flops * repeats / (time.perf_counter() - t0) / 1e9)
    return best


def model_shape_gflops(cfg, threads: int, batch: int = 16, frames: int = 200, labels: int = 40) -> dict:
    """The steady rate (sgemm_gflops) at the matrix products the default model really runs on a
    batch of `batch` utterances of `frames` frames and `labels` tokens: the first encoder layer's
    input projection, one recurrent step of an encoder layer, the predictor's recurrent step, and
    the joiner's output layer over the lattice."""
    from tinyrnnt.text import VOCAB_SIZE

    t1 = frames // cfg.stack_frames
    t2 = t1 // cfg.stack_after_first
    shapes = {
        "encoder_input": (batch * t1, cfg.feature_bins * cfg.stack_frames, 4 * cfg.encoder_dim),
        "encoder_step": (batch, cfg.encoder_dim, 4 * cfg.encoder_dim),
        "predictor_step": (batch, cfg.predictor_dim, 4 * cfg.predictor_dim),
        "joiner_output": (batch * t2 * (labels + 1), cfg.joiner_dim, VOCAB_SIZE),
    }
    return {name: round(sgemm_gflops(threads, n=n, m=m, k=k), 1) for name, (m, k, n) in shapes.items()}


def bench_train(args) -> dict:
    from tinyrnnt.lab.trainbench import run_train_bench

    return run_train_bench(args)


def bench_trie(args) -> dict:
    from tinyrnnt.lab.triebench import run_trie_bench

    return run_trie_bench(args)


def bench_fusion(args) -> dict:
    from tinyrnnt.lab.fusionbench import run_fusion_bench

    if args.run_dir == "runs/bench-fusion":
        args.run_dir = "runs/bench-trie"  # the models of the trie benchmark, shared
    return run_fusion_bench(args)


def bench_attention(args) -> dict:
    from tinyrnnt.lab.attentionbench import run_attention_bench

    return run_attention_bench(args)


def bench_faults(args) -> dict:
    from tinyrnnt.lab.faultbench import run_fault_bench

    return run_fault_bench(args)


def bench_audio(args) -> dict:
    from tinyrnnt.lab.audiobench import run_audio_bench

    return run_audio_bench(args)


def bench_quickstart(args) -> dict:
    from tinyrnnt.lab.quickstartbench import run_quickstart_bench

    return run_quickstart_bench(args)


def main(argv=None) -> int:
    p = argparse.ArgumentParser(prog="python -m tinyrnnt.bench", description=__doc__,
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("name", choices=["corpus", "train", "trie", "fusion", "attention", "faults", "audio", "quickstart"])
    p.add_argument("--corpus", default="corpora/default", help="default corpus folder (built when missing)")
    p.add_argument("--rebuild", action="store_true", help="corpus: rebuild the default corpus to time it")
    p.add_argument("--minutes", type=float, default=None,
                   help="train: training minutes (default 10); trie: a time cap on every run for a quick look "
                        "(default none: the recipe's step budgets)")
    p.add_argument("--seeds", type=int, default=1,
                   help="trie: training seeds per arm (default 1; 3 reports the spread of the gain)")
    p.add_argument("--fresh", action="store_true",
                   help="train/trie/attention: retrain even if a benchmark run exists")
    p.add_argument("--resume", action="store_true",
                   help="trie: with --fresh, keep arms an interrupted run already finished (same settings)")
    p.add_argument("--run-dir", default=None, help="train/trie/fusion: where the benchmark models "
                   "live (default runs/bench-train, runs/bench-trie; fusion uses the trie benchmark's)")
    p.add_argument("--limit", type=int, default=0,
                   help="fusion/attention: utterances per split decoded (default 0 = all)")
    p.add_argument("--trie-run-dir", default="runs/bench-trie",
                   help="attention: where the trie benchmark's models live (trained there when missing; "
                        "default runs/bench-trie)")
    p.add_argument("--sizes", default="10,100,1000,5000",
                   help="attention: list sizes of the cost measurement, comma-separated (default 10,100,1000,5000)")
    p.add_argument("--timing-utts", type=int, default=20,
                   help="attention: utterances decoded one at a time per method and size (default 20)")
    p.add_argument("--quick", action="store_true",
                   help="fusion: 4 boost weights and N = 100 only (a short look; not the quoted figures)")
    p.add_argument("--reference-utts", type=int, default=200,
                   help="fusion: utterances decoded by both our beam search and torchaudio's (default 200)")
    p.add_argument("--utts", type=int, default=200,
                   help="audio: utterances rendered and read for the speed figures (default 200, ~7 min of audio)")
    p.add_argument("--work", default=None,
                   help="audio: keep the WAVs, spoken corpus and runs in this folder (default: a temporary one); "
                        "quickstart: the empty folder the main job runs in from nothing (default: a new temporary one)")
    p.add_argument("--precision-steps", type=int, default=200,
                   help="quickstart: optimiser steps of each of the fp32 and bf16 runs (default 200)")
    p.add_argument("--outside-voice", action="store_true",
                   help="audio: also build the espeak-ng corpus and run the trie recipe on it (kept in --work, "
                        "default runs/bench-audio; resumable)")
    p.add_argument("--outside-preset", default=None, help="audio: corpus preset of the espeak-ng corpus (e.g. small)")
    p.add_argument("--outside-settings", nargs="*", default=[],
                   help="audio: recipe settings for the outside-voice run, e.g. train.steps=50 (a quick look)")
    args = p.parse_args(argv)
    args.run_dir = args.run_dir or f"runs/bench-{args.name}"
    if args.name == "train" and args.minutes is None:
        args.minutes = 10.0
    import signal

    from tinyrnnt.cli import Terminated, _terminated

    # SIGTERM is handled as Ctrl-C is, so the training workers of a recipe stop with the benchmark
    # (lab.armtraining kills its pool on KeyboardInterrupt) rather than live on as orphans.
    signal.signal(signal.SIGTERM, _terminated)
    try:
        result = {"corpus": bench_corpus, "train": bench_train, "trie": bench_trie, "fusion": bench_fusion,
                  "attention": bench_attention, "faults": bench_faults, "audio": bench_audio,
                  "quickstart": bench_quickstart}[args.name](args)
    except KeyboardInterrupt as stop:
        print("interrupted; arms already trained are kept (bench trie --fresh --resume continues)", file=sys.stderr)
        return 143 if isinstance(stop, Terminated) else 130
    result["peak_rss_mb_process"] = round(peak_rss_mb(), 1)
    print(json.dumps(result))
    return 0


if __name__ == "__main__":
    sys.exit(main())
