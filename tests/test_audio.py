"""Recorded-speech path: reading, log-mel, the corpus folder made from manifests, bad input.

The WAV files are made here (tones and noise written with soundfile), so every
expected value is known from the signal itself.
"""

import json

import numpy as np
import pytest
import soundfile as sf
import torch

from tinyrnnt.audio.corpus import AudioCorpusConfig, build_audio_corpus
from tinyrnnt.audio.features import FeatureConfig, LogMel, read_audio
from tinyrnnt.audio.manifest import ManifestError
from tinyrnnt.data import CorpusSplit
from tinyrnnt.synth.acoustics import hz_to_mel, mel_filterbank

SR = 16000


def tone(hz: float, seconds: float, sr: int = SR, amp: float = 0.3, seed: int = 0) -> np.ndarray:
    t = np.arange(int(seconds * sr)) / sr
    noise = np.random.default_rng(seed).normal(0, 1e-3, len(t))
    return (amp * np.sin(2 * np.pi * hz * t) + noise).astype(np.float32)


def test_filterbank_is_torchaudios_htk_filterbank():
    # The synthetic renderer's filterbank and torchaudio's (melscale_fbanks, HTK scale, no norm):
    # the same matrix, so recorded and synthetic features share their bins.
    import torchaudio.functional as AF

    ours = mel_filterbank(257, 80, SR)
    ref = AF.melscale_fbanks(257, 0.0, SR / 2, 80, SR, norm=None, mel_scale="htk").numpy()
    assert np.allclose(ours, ref, atol=1e-5)


def test_a_tone_lands_in_its_mel_bin_and_frames_follow_the_hop():
    cfg = FeatureConfig()
    feats = LogMel(cfg)(tone(1000.0, 1.0))
    assert feats.shape == (101, 80)  # 1 + 16000 // 160 centred frames
    # 1 kHz sits at HTK mel 1000.0; the filter whose centre is nearest holds the peak
    centres = np.linspace(0, hz_to_mel(SR / 2), 82)[1:-1]
    assert abs(int(feats[50].argmax()) - int(np.abs(centres - hz_to_mel(1000.0)).argmin())) <= 1
    assert feats.min() >= cfg.log_floor


def test_resampling_matches_torchaudio_and_keeps_the_tone(tmp_path):
    import torchaudio.functional as AF

    wave = tone(1000.0, 0.5, sr=22050)
    sf.write(tmp_path / "a.wav", wave, 22050, subtype="PCM_16")
    got = read_audio(tmp_path / "a.wav", FeatureConfig())
    raw, _ = sf.read(tmp_path / "a.wav", dtype="float32")
    assert np.allclose(got, AF.resample(torch.from_numpy(raw), 22050, SR).numpy())
    spectrum = np.abs(np.fft.rfft(got))
    assert abs(np.argmax(spectrum) * SR / len(got) - 1000.0) < 5


def _corpus_folder(tmp_path, n_train=12, extra=()):
    """A manifest folder of tones: the frequency is the word (so a model could learn it)."""
    words = {"ka": 600.0, "lo": 1200.0, "mi": 2400.0}
    folder = tmp_path / "manifests"
    (folder / "wav").mkdir(parents=True)
    rng = np.random.default_rng(0)
    for split, n in (("train", n_train), ("valid", 4), ("test", 4)):
        lines = []
        for i in range(n):
            ws = [list(words)[j] for j in rng.integers(0, 3, 2)]
            wave = np.concatenate([tone(words[w], 0.3, seed=i) for w in ws])
            name = f"wav/{split}{i}.wav"
            sf.write(folder / name, wave, SR, subtype="PCM_16")
            line = {"audio": name, "text": " ".join(ws), "speaker": f"s{i % 2}", "spans": [ws[0]]}
            if split == "test":
                line["list"] = [ws[0], "zorvik", "tamsell"][: 1 + i % 3]
            lines.append(json.dumps(line))
        if split == "train":
            lines += list(extra)
        (folder / f"{split}.jsonl").write_text("\n".join(lines) + "\n")
    return folder


def test_a_manifest_folder_becomes_a_corpus_every_command_reads(tmp_path):
    folder = _corpus_folder(tmp_path)
    card = build_audio_corpus(folder, tmp_path / "corpus", AudioCorpusConfig(list_size=3), quiet=True)
    assert card["splits"]["train"]["utterances"] == 12 and card["skipped_lines"] == 0
    assert card["splits"]["test"]["lists"] == {"max": 3} and "lists" not in card["splits"]["train"]
    split = CorpusSplit(tmp_path / "corpus", "test")
    # the stored frames are the log-mel of the file, quantised to 0.1 (the synthetic corpus's step)
    wave, _ = sf.read(folder / "wav" / "test0.wav", dtype="float32")
    direct = LogMel(FeatureConfig())(wave)
    stored = split.frames[: split.items[0]["frames"]] * 0.1 - 14.0
    assert stored.shape == direct.shape and np.abs(stored - np.clip(direct, -14, 11.5)).max() <= 0.05 + 1e-6
    # per-corpus normalisation: the train split's features come out with mean 0, deviation 1 per bin
    train = CorpusSplit(tmp_path / "corpus", "train")
    allf = np.concatenate([train.features(i) for i in range(len(train))])
    assert np.abs(allf.mean(0)).max() < 1e-3 and np.abs(allf.std(0) - 1).max() < 1e-2
    # lists: given ones kept in order, own word first; shorter rows padded
    assert split.biasing_list(2, 3) == [split.items[2]["spans"][0]["word"], "zorvik", "tamsell"]
    assert split.biasing_list(0, 3) == [split.items[0]["spans"][0]["word"]]
    # valid gave spans but no lists: random distractors, never the utterance's own word
    valid = CorpusSplit(tmp_path / "corpus", "valid")
    for i in range(len(valid)):
        lst = valid.biasing_list(i, 3)
        assert lst[0] == valid.items[i]["spans"][0]["word"] and len(set(lst)) == len(lst)


@pytest.mark.parametrize("make, expected", [
    (lambda d: None, "not found"),
    (lambda d: (d / "wav" / "bad.wav").write_text("not audio"), "not readable"),
    (lambda d: sf.write(d / "wav" / "bad.wav", np.zeros(0, np.float32), SR), "holds no samples"),
    (lambda d: sf.write(d / "wav" / "bad.wav", tone(500, 0.2, sr=8000), 8000), "sampled at 8000 Hz"),
    (lambda d: sf.write(d / "wav" / "bad.wav", np.stack([tone(500, 0.2)] * 2, 1), SR), "2 channels"),
])
def test_bad_audio_names_the_manifest_line_and_can_be_skipped(tmp_path, make, expected):
    line = json.dumps({"audio": "wav/bad.wav", "text": "ka lo"})
    folder = _corpus_folder(tmp_path, extra=[line])
    make(folder)
    with pytest.raises(ManifestError, match=rf"train.jsonl:13: .*{expected}"):
        build_audio_corpus(folder, tmp_path / "corpus", quiet=True)
    assert not (tmp_path / "corpus").exists()
    card = build_audio_corpus(folder, tmp_path / "corpus", AudioCorpusConfig(skip_bad_lines=True), quiet=True)
    assert card["skipped_lines"] == 1 and expected in card["skipped"][0]
    assert card["splits"]["train"]["utterances"] == 12


@pytest.mark.parametrize("line, expected", [
    ('{"audio": "wav/train0.wav", "text": "pier 7"}', r"character '7'"),
    ('{"audio": "wav/train0.wav"}', r"field 'text' must be a non-empty string"),
    ('{"audio": "wav/train0.wav", "text": "ka", "spans": ["lo"]}', r"'lo' is not in the transcript"),
    ('{"audio": "wav/train0.wav", "text": "ka", "volume": 3}', r"unknown field 'volume'"),
    ('not json', r"not a JSON object"),
])
def test_bad_manifest_lines_name_file_and_line(tmp_path, line, expected):
    folder = _corpus_folder(tmp_path, extra=[line])
    with pytest.raises(ManifestError, match=rf"train.jsonl:13: .*{expected}"):
        build_audio_corpus(folder, tmp_path / "corpus", quiet=True)
    card = build_audio_corpus(folder, tmp_path / "corpus", AudioCorpusConfig(skip_bad_lines=True), quiet=True)
    assert card["skipped_lines"] == 1


def test_training_on_the_corpus_reads_no_audio(tmp_path, monkeypatch):
    from tinyrnnt.experiment import load_experiment
    from tinyrnnt.lab.train import train

    folder = _corpus_folder(tmp_path, n_train=16)
    build_audio_corpus(folder, tmp_path / "corpus", quiet=True)
    import shutil

    shutil.rmtree(folder / "wav")  # the cache is all training may use

    def no_reads(*a, **k):
        raise AssertionError("training read an audio file")
    monkeypatch.setattr(sf, "read", no_reads)
    monkeypatch.setattr(sf, "SoundFile", no_reads)
    cfg = load_experiment(None, [f"data.corpus={tmp_path / 'corpus'}", f"run_dir={tmp_path / 'run'}",
                                 "data.batch_size=4", "data.valid_subset=4", "model.encoder_dim=16",
                                 "model.predictor_dim=16", "model.predictor_embed=8", "model.joiner_dim=16",
                                 "model.encoder_layers=2", "train.steps=8", "train.minutes=0", "train.threads=1",
                                 "train.validate_every_steps=4", "train.snapshot_minutes=0"])
    result = train(cfg, quiet=True)
    assert result.steps == 8  # two epochs of four batches


def test_the_command_reports_a_bad_line_in_one_error_line_or_skips_and_counts(tmp_path, capsys):
    from tinyrnnt.cli import main

    folder = _corpus_folder(tmp_path, extra=[json.dumps({"audio": "wav/gone.wav", "text": "ka"})])
    assert main(["audio-corpus", "--manifests", str(folder), "--out", str(tmp_path / "c"), "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error: ") and "train.jsonl:13" in err[0] and "not found" in err[0]
    assert main(["audio-corpus", "--manifests", str(folder), "--out", str(tmp_path / "c"), "--quiet", "--skip-bad-lines"]) == 0
    assert "skipped 1 bad lines" in capsys.readouterr().out
    assert main(["audio-corpus", "--manifests", str(folder), "--out", str(tmp_path / "d"), "--quiet", "features.colour=red"]) == 2
    assert "unknown key 'features.colour'" in capsys.readouterr().err


def test_a_recipe_pointed_at_the_manifests_uses_a_cache_made_once_inside_them(tmp_path):
    import os

    from tinyrnnt.experiment import load_experiment
    from tinyrnnt.lab.recipes import ensure_corpus

    folder = _corpus_folder(tmp_path)
    cfg = load_experiment(None, [f"data.corpus={folder}"])
    ensure_corpus(cfg, quiet=True)
    card = folder / "features" / "card.json"
    made = card.stat().st_mtime_ns
    assert len(CorpusSplit(folder, "train")) == 12  # the manifest folder reads as its cached corpus
    ensure_corpus(cfg, quiet=True)
    assert card.stat().st_mtime_ns == made  # nothing changed: not rebuilt
    later = made / 1e9 + 5
    os.utime(folder / "test.jsonl", (later, later))  # a manifest changed: rebuilt
    ensure_corpus(cfg, quiet=True)
    assert card.stat().st_mtime_ns != made
