"""Waveforms from phone strings: a source-filter formant synthesizer.

The design follows Klatt (1980), "Software for a cascade/parallel formant
synthesizer", JASA 67: an impulse train at the speaker's pitch shaped by a
low-pass glottal resonator (F = 0, bandwidth 100 Hz) and lip radiation (first
difference), plus aspiration noise, go through a nasal antiresonator and a
cascade of five formant resonators; frication and bursts are noise shaped on
a parallel branch and added at the output. Each resonator is Klatt's
second-order section y[n] = A x[n] + B y[n-1] + C y[n-2] with
C = -exp(-2 pi BW T), B = 2 exp(-pi BW T) cos(2 pi F T), A = 1 - B - C
(gain 1 at 0 Hz), its antiresonator the inverse FIR. Parameters change every
5 ms, as in Klatt's program (from memory); the resonators keep their past
outputs across a change.

Everything the feature renderer draws is drawn the same way here
(`tinyrnnt.synth.acoustics`): its duration model and timeline (the same
generator calls, so one seed gives the same durations), its spectral targets
(`phonetics.parts_table`: formants scaled per speaker, bandwidths, levels in
dB against the mean vowel, nasal antiresonances, noise bands), its speakers
(vocal tract, pitch, loudness) and its per-utterance SNR and gain. Frication
bands are Butterworth high- and low-pass filters with about the band's
slopes (6 dB/octave per order). Levels: each part's source amplitude is set so
that its output power against the mean vowel matches its dB level, from the
cascade's power gain on a 10 Hz grid; vowels keep their own.

Deliberately not done: intonation beyond a gentle fall over the utterance,
per-speaker source tilt, and the parallel branch's formant resonators.
"""

from __future__ import annotations

import numpy as np
from scipy import signal

from tinyrnnt.synth import phonetics as ph
from tinyrnnt.synth.acoustics import (GRID_HZ, AcousticConfig, Renderer, Speaker, _build_rows,
                                      _resonances)
from tinyrnnt.synth.phonetics import WOMEN_VOCAL_TRACT

BLOCK_MS = 5.0  # parameter update interval (Klatt 1980's, from memory)
NEUTRAL = np.array([*ph.NEUTRAL_FORMANTS, *ph.HIGH_FORMANTS])  # cascade settings where a part has none
ZERO_BW = 100.0  # antiresonance bandwidth, as the feature renderer's
SPEECH_DBFS = -23.0  # RMS of speech frames before the speaker's loudness and the utterance's gain


def resonator(freq, bw, sr: float):
    """Klatt's (A, B, C) for resonance freq and bandwidth bw in Hz (arrays broadcast).

    >>> a, b, c = resonator(0.0, 100.0, 16000)  # the glottal low-pass: gain 1 at 0 Hz
    >>> round(float(a + b + c), 12)
    1.0
    """
    T = 1.0 / sr
    freq, bw = np.broadcast_arrays(np.asarray(freq, float), np.asarray(bw, float))
    c = -np.exp(-2 * np.pi * bw * T)
    b = 2 * np.exp(-np.pi * bw * T) * np.cos(2 * np.pi * freq * T)
    return 1 - b - c, b, c


class _Timing:
    """The feature renderer's duration model alone (its own methods), without making its spectra."""

    _code = Renderer._code
    _timeline = Renderer._timeline

    def __init__(self, cfg: AcousticConfig, speakers):
        self.cfg, self.speakers, self.rows, self._codes = cfg, list(speakers), _build_rows(), {}


class WaveRenderer:
    """Phone sequences -> 16-bit PCM waveforms for a fixed set of speakers."""

    def __init__(self, cfg: AcousticConfig, speakers: list[Speaker]):
        if not speakers:
            raise ValueError("WaveRenderer needs at least one speaker")
        self.cfg, self.speakers, self.sr = cfg, list(speakers), cfg.sample_rate
        self.timing = _Timing(cfg, speakers)
        self.rows = rows = self.timing.rows
        R = len(rows.names)
        self.block = int(round(BLOCK_MS * self.sr / 1000))
        self.hop = int(round(cfg.hop_ms * self.sr / 1000))
        self.scales = np.linspace(1 - cfg.formant_spread, 1 + cfg.formant_spread, cfg.formant_variants) \
            if cfg.formant_variants > 1 else np.ones(1)
        self.has_voice = ~np.isnan(rows.voiced_db)
        self.has_asp = ~np.isnan(rows.aspirated_db)
        self.band_of = np.full(R, -1)
        bands = []
        for r in range(R):
            if not np.isnan(rows.band_db[r]):
                key = tuple(rows.band[r])
                if key not in bands:
                    bands.append(key)
                self.band_of[r] = bands.index(key)
        self.bands = np.array(bands)  # (bands, 4): low Hz, high Hz, low slope, high slope
        self._gains: dict[int, tuple] = {}
        self._band_filters: dict[tuple, np.ndarray | None] = {}

    def formants(self, spk: Speaker) -> tuple[np.ndarray, np.ndarray]:
        """(R, 5) formant Hz for this speaker at formant scale 1 (the feature renderer's rule: men's
        table at vocal tract 1, women's at WOMEN_VOCAL_TRACT, geometric in between), and bandwidths;
        slots a part does not use hold the neutral tube's."""
        rows, vt = self.rows, spk.vocal_tract
        t = np.clip(np.log(vt) / np.log(WOMEN_VOCAL_TRACT), 0.0, 1.0)
        F = rows.formants * np.exp(t * rows.log_ratio) * (vt / WOMEN_VOCAL_TRACT ** t)
        F = np.where(rows.mask > 0, F, NEUTRAL * vt)
        return F, np.where(rows.mask > 0, rows.bandwidths, np.array(ph.BANDWIDTHS))

    def gains(self, s: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Per part row: voice, aspiration and frication amplitudes for unit-power sources, so each
        part's output power against the mean vowel is its dB level (vowels: their own)."""
        if s in self._gains:
            return self._gains[s]
        rows = self.rows
        F, BW = self.formants(self.speakers[s])
        grid = np.arange(GRID_HZ, self.sr / 2, GRID_HZ)
        log_h = _resonances(grid, F, BW, np.ones_like(F))  # (R, grid) log power gain of the cascade
        zero = rows.zero * self.speakers[s].vocal_tract
        has = zero > 0
        log_h[has] -= _resonances(grid, zero[has, None], np.full((has.sum(), 1), ZERO_BW), np.ones((has.sum(), 1)))
        # voice source power: glottal low-pass resonator, then radiation |2 sin(pi f / sr)|^2
        a, b, c = resonator(0.0, 100.0, self.sr)
        z = np.exp(-2j * np.pi * grid / self.sr)
        source = np.abs(a / (1 - b * z - c * z ** 2)) ** 2 * (2 * np.sin(np.pi * grid / self.sr)) ** 2
        source /= source.sum()
        p_voice = (np.exp(log_h) * source).sum(1)
        p_noise = np.exp(log_h).mean(1)
        vowel = p_voice[[rows.names.index(v) for v in ph.VOWEL_FORMANTS_MEN]].mean()
        level = lambda db: 10 ** (np.nan_to_num(db, nan=-np.inf) / 10) * vowel  # noqa: E731
        voice = np.where(rows.natural, 1.0, np.sqrt(level(rows.voiced_db) / p_voice))
        voice = np.where(self.has_voice, voice, 0.0)
        asp = np.where(self.has_asp, np.sqrt(level(rows.aspirated_db) / p_noise), 0.0)
        fric = np.sqrt(level(rows.band_db))
        self._gains[s] = (voice, asp, fric, vowel)
        return self._gains[s]

    def render(self, utterances: list[list[str]], speaker_ids: list[int], rng: np.random.Generator
               ) -> list[np.ndarray]:
        """int16 waveforms at cfg.sample_rate, one per utterance. Draws, in the feature renderer's
        order: the timeline, then SNR, gain and channel tilt per utterance; then its own noise."""
        spk = np.asarray(speaker_ids, np.int64)
        p = self.timing._timeline(utterances, spk, rng)
        snr = rng.uniform(*self.cfg.snr_db, len(utterances))
        gain = rng.uniform(*self.cfg.level_db, len(utterances))
        rng.uniform(-self.cfg.channel_tilt_db, self.cfg.channel_tilt_db, len(utterances))  # tilt: not rendered
        part_utt = p["utt"]
        prepared = []
        for u in range(len(utterances)):
            sel = np.flatnonzero(part_utt == u)
            prepared.append(self._source(p["row"][sel], p["start"][sel], p["variant"][sel],
                                         int(p["n_frames"][u]), int(spk[u]), rng))
        ys = _cascade([x for x, *_ in prepared], [f for _, f, *_ in prepared], [b for _, _, b, _ in prepared],
                      self.block, self.sr)
        return [self._finish(y, ctx, float(snr[u]), float(gain[u]), rng)
                for u, (y, (*_, ctx)) in enumerate(zip(ys, prepared))]

    def steady(self, phone: str, seconds: float, speaker: int = 0, seed: int = 0) -> np.ndarray:
        """One part held steady (a vowel's target, say), no noise added: for checks."""
        r = self.rows.names.index(phone)
        n = int(seconds * 1000 / self.cfg.hop_ms)
        rng = np.random.default_rng(seed)
        x, freq, bw, ctx = self._source(np.array([r]), np.array([0.0]), np.array([len(self.scales) // 2]), n,
                                        speaker, rng)
        return self._finish(_cascade([x], [freq], [bw], self.block, self.sr)[0], ctx, None, 0.0, rng)

    def _source(self, row, start, variant, n_frames, s, rng):
        """One utterance up to the cascade: its input signal (voice, aspiration, nasal zero), the
        cascade's formant frequencies and bandwidths per block, and what `_finish` needs."""
        sr, blk = self.sr, self.block
        n = n_frames * self.hop
        n_blocks = -(-n // blk)
        voice_g, asp_g, _, _ = self.gains(s)
        spk = self.speakers[s]
        F, BW = self.formants(spk)
        # Block targets: the part holding each block's centre (frames of 10 ms).
        centre = (np.arange(n_blocks) + 0.5) * blk / self.hop
        k = np.clip(np.searchsorted(start, centre, side="right") - 1, 0, len(row) - 1)
        r = row[k]
        logf = np.log(F[r] * self.scales[variant[k]][:, None])  # (blocks, 5)
        bw = BW[r]
        # Coarticulation: formant tracks smoothed over the renderer's transition width.
        width = max(int(round(self.cfg.coarticulation_ms / BLOCK_MS)), 1)
        logf, bw = _smooth(logf, width), _smooth(bw, width)
        amp = _smooth(np.stack([voice_g[r], asp_g[r]], 1), 2)  # (blocks, 2): short fades, no clicks

        # Voice source: impulses at the pitch (a gentle fall over the utterance), glottal low-pass,
        # radiation; scaled to unit power.
        f0 = spk.pitch_hz * np.linspace(1.05, 0.9, n)
        phase = np.cumsum(f0 / sr)
        pulses = np.diff(np.floor(phase), prepend=0.0)
        a, b, c = resonator(0.0, 100.0, sr)
        voice = np.diff(signal.lfilter([a], [1, -b, -c], pulses), prepend=0.0)
        voice /= np.sqrt(np.mean(voice ** 2)) + 1e-12
        noise = rng.standard_normal(n)
        x = _per_sample(amp[:, 0], blk, n) * voice + _per_sample(amp[:, 1], blk, n) * noise

        # Nasal antiresonator: the inverse of a resonator, faded in where a part has a zero.
        zero = self.rows.zero[r] * spk.vocal_tract
        if (zero > 0).any():
            on = _per_sample(_smooth((zero > 0).astype(float)[:, None], 2)[:, 0], blk, n)
            za, zb, zc = resonator(np.where(zero > 0, zero, 1000.0), ZERO_BW, sr)
            za, zb, zc = (_per_sample(v, blk, n) for v in (za, zb, zc))
            x1, x2 = np.concatenate([[0.0], x[:-1]]), np.concatenate([[0.0, 0.0], x[:-2]])
            x = (1 - on) * x + on * (x - zb * x1 - zc * x2) / za
        return x, np.exp(logf), bw, (r, s, n)

    def _finish(self, y, ctx, snr, gain_db, rng) -> np.ndarray:
        """Add the parallel branch, set the level, add background noise, quantise to 16 bits."""
        r, s, n = ctx
        blk = self.block
        _, _, fric_g, vowel_power = self.gains(s)
        spk = self.speakers[s]
        # Parallel branch: each band in use, unit-power noise, gated by its parts' amplitudes.
        band = self.band_of[r]
        for j in np.unique(band[band >= 0]):
            gate = _per_sample(_smooth(np.where(band == j, fric_g[r], 0.0)[:, None], 2)[:, 0], blk, n)
            y += gate * self._band_noise(j, spk.vocal_tract, rng.standard_normal(n))

        level = 10 ** ((SPEECH_DBFS + spk.loudness_db + gain_db) / 20)
        frames = np.repeat(r != self.rows.names.index("silence"), blk)[:n]  # speech, for its level
        ref = np.sqrt(np.mean(y[frames] ** 2)) if frames.any() else np.sqrt(vowel_power)
        y *= level / (ref + 1e-12)
        if snr is not None:
            hiss = signal.lfilter([1.0], [1.0, -0.9], rng.standard_normal(n))  # low-frequency heavy
            y += hiss * (level / np.sqrt(np.mean(hiss ** 2))) * 10 ** (-snr / 20)
        peak = np.abs(y).max()
        if peak > 0.98:  # subtle: scale down rather than clip, which would add energy at every frequency
            y *= 0.98 / peak
        return np.round(y * 32767).astype(np.int16)

    def _band_noise(self, j: int, vt: float, noise: np.ndarray) -> np.ndarray:
        # subtle: band edges scale with the vocal tract in steps of 1 % (filter designs are cached;
        # a design per speaker cost more than the rest of an utterance)
        key = (j, round(vt, 2))
        if key not in self._band_filters:
            lo, hi, lo_slope, hi_slope = self.bands[j]
            nyq, lo, hi = self.sr / 2, lo * key[1], hi * key[1]
            n_lo, n_hi = int(round(lo_slope / 6)), int(round(hi_slope / 6))
            sos = []
            if n_lo > 0 and lo < nyq * 0.95:
                sos.append(signal.butter(n_lo, lo, "highpass", fs=self.sr, output="sos"))
            if n_hi > 0 and hi < nyq * 0.95:
                sos.append(signal.butter(n_hi, hi, "lowpass", fs=self.sr, output="sos"))
            self._band_filters[key] = np.concatenate(sos) if sos else None
        sos = self._band_filters[key]
        out = noise if sos is None else signal.sosfilt(sos, noise)
        return out / (np.sqrt(np.mean(out ** 2)) + 1e-12)


def _smooth(x: np.ndarray, width: int) -> np.ndarray:
    """Moving average over `width` blocks along axis 0, edges held.

    >>> _smooth(np.array([[0.0], [0.0], [3.0], [3.0]]), 2)[:, 0].tolist()
    [0.0, 0.0, 1.5, 3.0]
    """
    if width <= 1:
        return x
    pad = np.concatenate([np.repeat(x[:1], width // 2, 0), x, np.repeat(x[-1:], width - 1 - width // 2, 0)])
    c = np.cumsum(np.concatenate([np.zeros((1,) + x.shape[1:]), pad]), 0)
    return (c[width:] - c[:-width]) / width


def _per_sample(values: np.ndarray, blk: int, n: int) -> np.ndarray:
    """Block values -> samples, linearly interpolated between block centres (no steps, no clicks)."""
    centres = (np.arange(len(values)) + 0.5) * blk
    return np.interp(np.arange(n), centres, values)


def _cascade(xs: list[np.ndarray], freqs: list[np.ndarray], bws: list[np.ndarray], blk: int, sr: float
             ) -> list[np.ndarray]:
    """Each x through five resonators in cascade, coefficients per block (freqs, bws: (blocks, 5)
    each), every utterance of the list at once.

    Klatt's recursion sample by sample, vectorised over utterances and sections: section k runs
    k samples behind section k-1, so at every step each section's input is the output its
    predecessor made at the step before, and all five update together.
    """
    B, K = len(xs), 5
    n_max, nb = max(len(x) for x in xs), max(len(f) for f in freqs)
    X = np.zeros((n_max + K - 1, B))  # time first: one row per step
    for i, x in enumerate(xs):
        X[: len(x), i] = x
    pad = lambda a: np.concatenate([a, np.repeat(a[-1:], nb - len(a), 0)])  # noqa: E731
    A, Bc, C = resonator(np.stack([pad(f) for f in freqs], 1), np.stack([pad(b) for b in bws], 1), sr)  # (nb, B, K)
    out = np.empty((n_max, B))
    y1, y2, inp = np.zeros((B, K)), np.zeros((B, K)), np.zeros((B, K))
    lag = np.arange(K)
    for n in range(n_max + K - 1):
        if n % blk < K:  # some section just entered a new block
            blocks = np.clip((n - lag) // blk, 0, nb - 1)
            a, b, c = A[blocks, :, lag].T, Bc[blocks, :, lag].T, C[blocks, :, lag].T  # (B, K)
        inp[:, 0] = X[n]
        inp[:, 1:] = y1[:, :-1]
        y = a * inp
        y += b * y1
        y += c * y2
        y1, y2 = y, y1
        if n >= K - 1:
            out[n - K + 1] = y[:, K - 1]
    return [out[: len(x), i].copy() for i, x in enumerate(xs)]
