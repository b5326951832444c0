"""The formant synthesizer and the spoken synthetic corpus, end to end through the audio path."""

import json

import numpy as np
import pytest
import scipy.linalg
import scipy.signal
import soundfile as sf

from tinyrnnt.audio.corpus import build_audio_corpus
from tinyrnnt.audio.formant import WaveRenderer, resonator
from tinyrnnt.audio.speak import speak_corpus
from tinyrnnt.data import CorpusSplit
from tinyrnnt.synth import phonetics as ph
from tinyrnnt.synth.acoustics import AcousticConfig, Speaker
from tinyrnnt.synth.corpus import CorpusConfig, build_corpus

from tests.test_pipeline import TINY


def lpc_formants(x: np.ndarray, sr: int = 16000, order: int = 18) -> np.ndarray:
    """Formant estimates from the roots of a linear-prediction polynomial (autocorrelation method,
    Makhoul 1975, Proc. IEEE 63; pre-emphasis 0.97 and order 2 + sr/1000 are common practice):
    angles of the roots with bandwidth under 500 Hz, above 150 Hz."""
    x = scipy.signal.lfilter([1.0, -0.97], [1.0], x.astype(float) / 32768)
    seg = x[len(x) // 4: len(x) // 4 + 1024] * np.hamming(1024)
    r = np.correlate(seg, seg, "full")[1023:1023 + order + 1]
    a = scipy.linalg.solve_toeplitz(r[:-1], r[1:])
    roots = np.roots(np.concatenate([[1.0], -a]))
    roots = roots[roots.imag > 0]
    f, bw = np.angle(roots) * sr / (2 * np.pi), -np.log(np.abs(roots)) * sr / np.pi
    return np.sort(f[(bw < 500) & (f > 150)])


@pytest.mark.parametrize("voice", ["men", "women"])
def test_a_steady_vowel_has_spectral_peaks_at_its_formant_targets(voice):
    # Targets: Peterson & Barney (1952) averages, as tinyrnnt.synth.phonetics holds them (from memory).
    # The steady vowel's three lowest LPC formants lie within 8 % of them, or within half the
    # pitch: LPC on voiced speech snaps a peak toward the nearest harmonic (common practice; it
    # shows on F1 of high-pitched voices, e.g. UW of a 205 Hz voice read near 2 x 205 Hz).
    table = ph.VOWEL_FORMANTS_MEN if voice == "men" else ph.VOWEL_FORMANTS_WOMEN
    spk = Speaker() if voice == "men" else Speaker(vocal_tract=ph.WOMEN_VOCAL_TRACT, pitch_hz=205.0)
    renderer = WaveRenderer(AcousticConfig(), [spk])
    for vowel, targets in table.items():
        got, want = lpc_formants(renderer.steady(vowel, 0.5))[:3], np.array(targets, float)
        assert np.all(np.abs(got - want) < np.maximum(0.08 * want, spk.pitch_hz / 2)), (vowel, got, targets)


def test_the_resonator_peaks_at_its_frequency_with_its_bandwidth():
    # Klatt (1980): the -3 dB width of the resonator's peak is its bandwidth; gain 1 at 0 Hz.
    a, b, c = resonator(1000.0, 100.0, 16000)
    w, h = scipy.signal.freqz([a], [1, -b, -c], worN=np.arange(0, 2000, 1.0), fs=16000)
    p = np.abs(h) ** 2
    assert abs(w[p.argmax()] - 1000) <= 2 and abs(abs(h[0]) - 1) < 1e-9
    half = w[p >= p.max() / 2]
    assert abs((half[-1] - half[0]) - 100) < 5


def test_waveforms_are_16_bit_16_khz_in_a_stated_loudness_range_and_deterministic(tmp_path):
    cfg = AcousticConfig()
    renderer = WaveRenderer(cfg, [Speaker(), Speaker(vocal_tract=1.17, pitch_hz=210, loudness_db=2.0)])
    phones = [["HH", "AH0", "L", "OW1"], ["S", "IY1", "pau", "Y", "UW1", "T", "UW1", "M", "AA1", "R", "OW0"]]
    waves = renderer.render(phones, [0, 1], np.random.default_rng(3))
    again = renderer.render(phones, [0, 1], np.random.default_rng(3))
    assert all(np.array_equal(a, b) for a, b in zip(waves, again))
    for i, w in enumerate(waves):
        sf.write(tmp_path / f"{i}.wav", w, 16000, subtype="PCM_16")
        info = sf.info(tmp_path / f"{i}.wav")
        assert (info.samplerate, info.channels, info.subtype) == (16000, 1, "PCM_16")
        x = w / 32768.0
        rms_db = 20 * np.log10(np.sqrt(np.mean(x ** 2)))
        # speech is set to -23 dBFS RMS +- speaker loudness and utterance gain (at most 12 dB), and
        # silences pull the whole file's RMS a few dB lower; nothing clips
        assert -45 < rms_db < -8 and np.abs(x).max() < 0.99


def test_the_spoken_corpus_goes_through_the_audio_path_to_training_and_decoding(tmp_path):
    from tinyrnnt.experiment import load_experiment
    from tinyrnnt.lab.evaluate import evaluate
    from tinyrnnt.lab.train import load_model, train

    cfg = CorpusConfig(seed=5, **TINY)
    info = speak_corpus(cfg, tmp_path / "spoken", quiet=True)
    assert info["audio_seconds"] > 0
    card = build_audio_corpus(tmp_path / "spoken", tmp_path / "from_audio", quiet=True)
    build_corpus(cfg, tmp_path / "features", quiet=True)
    # the same utterances, speakers, spans, lists and durations as the feature corpus
    for split in ("train", "test_unseen"):
        a, f = CorpusSplit(tmp_path / "from_audio", split), CorpusSplit(tmp_path / "features", split)
        assert [(x["id"], x["text"], x["speaker"], x["spans"]) for x in a.items] == \
               [(x["id"], x["text"], x["speaker"], x["spans"]) for x in f.items]
        # one more frame from audio: centred frames count 1 + samples // hop
        assert [x["frames"] for x in a.items] == [x["frames"] + 1 for x in f.items]
    a, f = CorpusSplit(tmp_path / "from_audio", "test_unseen"), CorpusSplit(tmp_path / "features", "test_unseen")
    assert all(a.biasing_list(i, 10) == f.biasing_list(i, 10) for i in range(len(a)))
    assert card["skipped_lines"] == 0 and card["splits"]["train"]["clipped_share"] < 0.01

    run = tmp_path / "run"
    exp = load_experiment(None, [f"data.corpus={tmp_path / 'from_audio'}", f"run_dir={run}", "data.batch_size=16",
                                 "data.valid_subset=8", "model.encoder_dim=32", "model.predictor_dim=32",
                                 "model.predictor_embed=16", "model.joiner_dim=24", "model.encoder_layers=2",
                                 "train.steps=6", "train.minutes=0", "train.threads=1",
                                 "train.validate_every_steps=3", "train.snapshot_minutes=0"])
    result = train(exp, quiet=True)
    model, _, _ = load_model(result.last_checkpoint)
    records, summary = evaluate(model, a, list_size=10)
    assert len(records) == len(a) and 0 <= summary["wer"] and json.dumps(summary)
    # the exported model decodes alike
    from tinyrnnt.lab.export import export_checkpoint, load_exported

    exported, _ = load_exported(export_checkpoint(result.last_checkpoint, tmp_path / "model.pt"))
    again, _ = evaluate(exported, a, list_size=10)
    assert [r["hyp"] for r in again] == [r["hyp"] for r in records]
