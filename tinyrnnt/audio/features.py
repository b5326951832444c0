"""Audio files to log-mel frames with the synthetic corpus's frame settings.

Reading is `soundfile` (WAV, FLAC; torchaudio's own loader needs torchcodec),
resampling `torchaudio.functional.resample`, the filterbank
`torchaudio.transforms.MelSpectrogram`. The settings match what the synthetic
renderer imitates (`tinyrnnt.synth.acoustics`): 16 kHz, 25 ms Hamming window,
512-point FFT, 10 ms hop, 80 unnormalised triangular filters on the HTK mel
scale from 0 Hz to Nyquist, power spectrum, natural log with the same soft
floor (log(power + exp(floor))). `tests/test_audio.py` checks that the two
filterbanks are the same matrix.

Every problem with a file is an AudioError whose message says what was expected;
callers prefix the manifest line.

This module deliberately does not normalise: the corpus builder computes each
corpus's mean and deviation per bin, and the data loader applies them.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch

from tinyrnnt.data import CorpusError
from tinyrnnt.synth.acoustics import AcousticConfig

_SYNTH = AcousticConfig()


class AudioError(CorpusError):
    """An audio file is missing, unreadable, empty, or of a rate or channel count not accepted."""


@dataclass
class FeatureConfig:
    sample_rate: int = _SYNTH.sample_rate  # features are made at this rate
    n_mels: int = _SYNTH.n_mels
    hop_ms: float = _SYNTH.hop_ms
    window_ms: float = 25.0  # Hamming window length (the renderer's harmonic lines assume 25 ms)
    n_fft: int = 512
    log_floor: float = _SYNTH.log_floor  # natural log; features never fall below it
    resample: bool = True  # files at a higher rate are resampled; false: any other rate is an error
    mix_channels: bool = False  # several channels are averaged; false: a file with more than one is an error

    def __post_init__(self):
        from tinyrnnt.config import ConfigError, require

        require(self, "features", positive=("sample_rate", "n_mels", "hop_ms", "window_ms", "n_fft"))
        if self.window_ms * self.sample_rate / 1000 > self.n_fft:
            raise ConfigError(f"features.window_ms {self.window_ms} is longer than n_fft {self.n_fft} samples")

    @property
    def hop(self) -> int:
        return int(round(self.hop_ms * self.sample_rate / 1000))


def read_audio(path: str | Path, cfg: FeatureConfig) -> np.ndarray:
    """Mono float32 samples in [-1, 1] at cfg.sample_rate; AudioError for anything else."""
    import soundfile as sf

    path = Path(path)
    if not path.is_file():
        raise AudioError(f"audio file {path} not found")
    try:
        data, rate = sf.read(str(path), dtype="float32", always_2d=True)  # (samples, channels)
    except (sf.LibsndfileError, RuntimeError, TypeError, ValueError) as err:
        raise AudioError(f"audio file {path} is not readable as WAV or FLAC ({err})") from None
    if data.shape[0] == 0:
        raise AudioError(f"audio file {path} holds no samples")
    if data.shape[1] != 1:
        if not cfg.mix_channels:
            raise AudioError(f"audio file {path} has {data.shape[1]} channels, expected 1 "
                             "(set features.mix_channels=true to average them)")
        data = data.mean(1, keepdims=True)
    wave = data[:, 0]
    if rate != cfg.sample_rate:
        if not cfg.resample or rate < cfg.sample_rate:
            why = ("upsampling cannot restore the band the mel filters above "
                   f"{rate // 2} Hz expect" if rate < cfg.sample_rate else "features.resample is false")
            raise AudioError(f"audio file {path} is sampled at {rate} Hz, expected {cfg.sample_rate} Hz ({why})")
        import torchaudio.functional as AF

        wave = AF.resample(torch.from_numpy(wave), rate, cfg.sample_rate).numpy()
    if not np.isfinite(wave).all():
        raise AudioError(f"audio file {path} holds samples that are not finite numbers")
    return wave


class LogMel:
    """Samples -> (T, n_mels) float32 natural-log mel power, T = 1 + samples // hop (centred frames)."""

    def __init__(self, cfg: FeatureConfig):
        import torchaudio

        self.cfg = cfg
        self.transform = torchaudio.transforms.MelSpectrogram(
            sample_rate=cfg.sample_rate, n_fft=cfg.n_fft, win_length=int(round(cfg.window_ms * cfg.sample_rate / 1000)),
            hop_length=cfg.hop, f_min=0.0, f_max=cfg.sample_rate / 2, n_mels=cfg.n_mels,
            window_fn=torch.hamming_window, power=2.0, norm=None, mel_scale="htk", center=True)
        self.floor = float(np.exp(cfg.log_floor))

    def __call__(self, wave: np.ndarray) -> np.ndarray:
        with torch.no_grad():
            power = self.transform(torch.from_numpy(np.ascontiguousarray(wave, dtype=np.float32)))  # (M, T)
        return torch.log(power + self.floor).T.contiguous().numpy()  # (T, M)

    def frames(self, n_samples: int) -> int:
        """Frames made from n_samples samples (torch.stft with center=True).

        >>> LogMel(FeatureConfig()).frames(16000)
        101
        """
        return 1 + n_samples // self.cfg.hop
