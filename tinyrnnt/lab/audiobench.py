"""The audio benchmark: rendering and feature speed on one core, the feature cache, distributed
training, and (once its corpus exists) the outside-voice comparison.

    render_x_realtime_1core     seconds of 16 kHz audio the formant synthesizer makes per second
                                (wall clock; *_processor_time: per second of this process's processor
                                time, which a busy machine does not lower)
    features_x_realtime_1core   seconds of WAV read, resampled if needed and turned into log-mel per second
    second_epoch_audio_reads    audio files opened during the second training epoch (soundfile counted)
    ddp_ranks_agree             2 CPU processes (gloo) end a short training with identical weights
    outside_voice_*             B-WER / U-WER of the trie arm and its control on the espeak-ng corpus

Everything is built in a scratch folder (or --work) and timed with one thread.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

TINY = dict(train_utts=160, valid_utts=16, test_utts=16, test_unseen_utts=16, test_soundalike_utts=8,
            max_list_size=200, list_sizes=(0, 10), train_speakers=4, heldout_speakers=2, workers=1)
OUTSIDE_VOICE_KEYS = ("outside_voice_bwer_control_n100", "outside_voice_bwer_trie_n100",
                      "outside_voice_uwer_control_n100", "outside_voice_uwer_trie_n100")


def _log(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


def tiny_config():
    from tinyrnnt.synth.corpus import CorpusConfig
    from tinyrnnt.synth.sentences import TextConfig

    return CorpusConfig(seed=5, **TINY, text=TextConfig(n_invented_names=500, n_compounds=150, few_shot_share=0.004,
                                                        extra_styles={"fell": 40, "reed": 30}))


def render_speed(n_utts: int, folder: Path) -> tuple[float, float]:
    """(x real time, audio seconds): default-corpus sentences and speakers rendered on one core;
    the waveforms are written to `folder` as WAV for the feature timing."""
    import soundfile as sf

    from tinyrnnt.audio.formant import WaveRenderer
    from tinyrnnt.synth.acoustics import make_speakers
    from tinyrnnt.synth.corpus import CorpusConfig, make_text

    cfg = CorpusConfig()
    _, _, splits = make_text(cfg)
    speakers = make_speakers(50, np.random.default_rng(0), cfg.acoustics)
    renderer = WaveRenderer(cfg.acoustics, speakers)
    phones = [s.phones for s in splits["train"][:n_utts]]
    ids = [i % len(speakers) for i in range(len(phones))]
    renderer.render(phones[:5], ids[:5], np.random.default_rng(1))  # warm-up: per-speaker gains are cached
    for s in range(len(speakers)):
        renderer.gains(s)
    t0, c0 = time.perf_counter(), time.process_time()
    waves = renderer.render(phones, ids, np.random.default_rng(2))
    dt, cpu = time.perf_counter() - t0, time.process_time() - c0
    audio = sum(len(w) for w in waves) / cfg.acoustics.sample_rate
    folder.mkdir(parents=True, exist_ok=True)
    for i, w in enumerate(waves):
        sf.write(folder / f"{i:05d}.wav", w, cfg.acoustics.sample_rate, subtype="PCM_16")
    _log(f"rendered {len(waves)} utterances, {audio:.0f} s of audio, in {dt:.1f} s on one core "
         f"({cpu:.1f} s of processor time)")
    return audio / dt, audio / cpu, audio


def feature_speed(folder: Path) -> float:
    """Seconds of audio per second: read each WAV (soundfile) and make its log-mel frames."""
    from tinyrnnt.audio.features import FeatureConfig, LogMel, read_audio

    cfg = FeatureConfig()
    logmel = LogMel(cfg)
    files = sorted(folder.glob("*.wav"))
    logmel(read_audio(files[0], cfg))  # warm-up
    t0, c0 = time.perf_counter(), time.process_time()
    samples = 0
    for f in files:
        wave = read_audio(f, cfg)
        logmel(wave)
        samples += len(wave)
    dt, cpu = time.perf_counter() - t0, time.process_time() - c0
    _log(f"features of {len(files)} files, {samples / cfg.sample_rate:.0f} s of audio, in {dt:.2f} s on one core "
         f"({cpu:.2f} s of processor time)")
    return samples / cfg.sample_rate / dt, samples / cfg.sample_rate / cpu


class _CountingReads:
    """Wraps soundfile's readers and counts every file they open."""

    def __init__(self):
        import soundfile as sf

        self.sf, self.count = sf, 0
        self.read, self.SoundFile = sf.read, sf.SoundFile

    def __enter__(self):
        def read(*a, **k):
            self.count += 1
            return self.read(*a, **k)

        def sound_file(*a, **k):
            self.count += 1
            return self.SoundFile(*a, **k)

        self.sf.read, self.sf.SoundFile = read, sound_file
        return self

    def __exit__(self, *exc):
        self.sf.read, self.sf.SoundFile = self.read, self.SoundFile


def cache_reads(corpus: Path, run_dir: Path) -> dict:
    """Train two epochs on an audio-built corpus with soundfile counted: reads per epoch."""
    import lightning as L

    from tinyrnnt.experiment import load_experiment
    from tinyrnnt.lab.train import train

    class PerEpoch(L.Callback):
        def __init__(self, counter):
            self.counter, self.at_start, self.reads = counter, 0, []

        def on_train_epoch_start(self, trainer, task):
            self.at_start = self.counter.count

        def on_train_epoch_end(self, trainer, task):
            self.reads.append(self.counter.count - self.at_start)

    cfg = load_experiment(None, [f"data.corpus={corpus}", f"run_dir={run_dir}", "data.batch_size=16",
                                 "data.valid_subset=8", "model.encoder_dim=32", "model.predictor_dim=32",
                                 "model.predictor_embed=16", "model.joiner_dim=24", "model.encoder_layers=2",
                                 "train.steps=20", "train.minutes=0", "train.threads=1",
                                 "train.validate_every_steps=10", "train.snapshot_minutes=0"])
    with _CountingReads() as counter:
        per_epoch = PerEpoch(counter)
        result = train(cfg, quiet=True, callbacks=[per_epoch])
    _log(f"trained {result.steps} steps over {len(per_epoch.reads)} epochs; audio files opened per epoch: "
         f"{per_epoch.reads}")
    return {"epochs": len(per_epoch.reads), "reads_per_epoch": per_epoch.reads, "total": counter.count}


def outside_voice(args, work: Path) -> dict:
    """The espeak-ng corpus of the default settings (or --outside-preset), spoken and cached once
    into `work`, then the trie recipe with its control arm on it (resumable); test_unseen at N = 100."""
    from tinyrnnt.audio.corpus import build_audio_corpus
    from tinyrnnt.audio.outside import EspeakVoice, espeak_path
    from tinyrnnt.audio.speak import speak_corpus
    from tinyrnnt.lab.recipes import run_recipe
    from tinyrnnt.synth.corpus import corpus_config

    espeak_path()
    cfg = corpus_config([], args.outside_preset)
    spoken, corpus = work / "outside_spoken", work / "outside_corpus"
    t0 = time.perf_counter()
    if not (spoken / "inventory.tsv").is_file():
        info = speak_corpus(cfg, spoken, list_size=100, voice=EspeakVoice)
        _log(f"outside voice: {info['utterances']} utterances, {info['audio_seconds'] / 3600:.2f} h spoken by "
             f"espeak-ng in {time.perf_counter() - t0:.0f} s")
    if not (corpus / "card.json").is_file():
        build_audio_corpus(spoken, corpus)
    rows = run_recipe("trie_vs_baseline", [f"data.corpus={corpus}", f"out_dir={work / 'outside_runs'}",
                                           "evaluate.list_sizes=[0,100]", *args.outside_settings],
                      quiet=True, resume=True)

    def pick(run: str, key: str):
        return next(round(r[key], 4) for r in rows if r["run"] == run and r["split"] == "test_unseen"
                    and r["list_size"] == 100 and r["decoding"] == "greedy")
    return {"outside_voice_bwer_control_n100": pick("trie_control", "bwer"),
            "outside_voice_bwer_trie_n100": pick("trie", "bwer"),
            "outside_voice_uwer_control_n100": pick("trie_control", "uwer"),
            "outside_voice_uwer_trie_n100": pick("trie", "uwer"),
            "outside_voice_seconds": round(time.perf_counter() - t0, 1)}


def run_audio_bench(args) -> dict:
    import torch

    from tinyrnnt.audio.corpus import build_audio_corpus
    from tinyrnnt.audio.speak import speak_corpus
    from tinyrnnt.lab.ddpcheck import compare

    torch.set_num_threads(1)
    keep = args.work or ("runs/bench-audio" if args.outside_voice else None)  # the outside corpus is kept
    work = Path(keep) if keep else Path(tempfile.mkdtemp(prefix="tinyrnnt-audio-bench-"))
    try:
        render_x, render_cpu_x, audio_s = render_speed(args.utts, work / "timing_wavs")
        feat_x, feat_cpu_x = feature_speed(work / "timing_wavs")
        t0 = time.perf_counter()
        spoken = speak_corpus(tiny_config(), work / "spoken", overwrite=True, quiet=True)
        card = build_audio_corpus(work / "spoken", work / "corpus", overwrite=(work / "corpus").exists(), quiet=True)
        _log(f"tiny spoken corpus: {spoken['utterances']} utterances, {spoken['audio_seconds']:.0f} s of audio, "
             f"spoken and cached in {time.perf_counter() - t0:.1f} s")
        reads = cache_reads(work / "corpus", work / "run")
        env = {**os.environ, "OMP_NUM_THREADS": "1",
               "PYTHONPATH": os.pathsep.join([str(Path(__file__).resolve().parents[2]), os.environ.get("PYTHONPATH", "")])}
        t0 = time.perf_counter()
        done = subprocess.run([sys.executable, "-m", "tinyrnnt.lab.ddpcheck", "--corpus", str(work / "corpus"),
                               "--out", str(work / "ddp"), "--steps", "4"], env=env, capture_output=True, text=True)
        if done.returncode != 0:
            _log(done.stderr[-3000:])
            ddp = {"ranks_agree": False, "max_weight_difference": None, "disjoint_utterances": None}
        else:
            ddp = compare(work / "ddp")
        _log(f"distributed check (2 CPU processes, gloo, 4 steps): {ddp} in {time.perf_counter() - t0:.0f} s")
        espeak = shutil.which("espeak-ng")
        if args.outside_voice:
            outside = outside_voice(args, work)
        else:
            outside = {k: None for k in OUTSIDE_VOICE_KEYS}
            outside["outside_voice_reason"] = ("not run: pass --outside-voice (speaks the default corpus with "
                                               "espeak-ng, then the trie recipe, itself about 20 min on 2 idle "
                                               "cores)" if espeak else
                                               "espeak-ng is not installed (apt-get install espeak-ng)")
        result = {
            "render_x_realtime_1core": round(render_x, 1),
            "render_x_realtime_1core_processor_time": round(render_cpu_x, 1),
            "render_audio_seconds": round(audio_s, 1),
            "features_x_realtime_1core": round(feat_x, 1),
            "features_x_realtime_1core_processor_time": round(feat_cpu_x, 1),
            "second_epoch_audio_reads": reads["reads_per_epoch"][1] if len(reads["reads_per_epoch"]) > 1 else None,
            "training_audio_reads": reads["total"],
            "audio_corpus_skipped_lines": card["skipped_lines"],
            "ddp_ranks_agree": ddp["ranks_agree"],
            "ddp_max_weight_difference": ddp["max_weight_difference"],
            "ddp_disjoint_utterances": ddp["disjoint_utterances"],
            **outside,
        }
        return result
    finally:
        if not keep:
            shutil.rmtree(work, ignore_errors=True)
