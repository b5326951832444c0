"""Acoustic renderer: one flat ARPAbet phone sequence per utterance -> log-mel-like frames.

Source-filter synthesis done in the spectral domain (Fant 1960, "Acoustic
theory of speech production"): voiced sounds are a harmonic source with a
falling slope passed through a cascade of formant resonators (the cascade
branch of Klatt 1980, JASA 67); noise sounds are shaped noise bands or
aspiration through the formants of the next sound. Each phone is one to four
parts (closure, burst, aspiration; or glide steps of a diphthong) with a fixed
spectral target each.

All spectra are made once per speaker and formant scale in `Renderer.__init__`
on a 10 Hz linear grid and projected to mel. `render` only draws durations,
gathers and blends those targets frame by frame (coarticulation), adds jitter
and pinkish noise in the power domain and takes the log, vectorised over a
chunk of utterances.

Deliberately not done: waveforms, intonation, and any cue at word boundaries
(the renderer never sees words; only "pau" may become silence).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass, fields

import numpy as np

from tinyrnnt.synth import phonetics as ph
from tinyrnnt.synth.phonetics import WOMEN_VOCAL_TRACT

DB = np.log(10.0) / 10.0  # dB -> natural-log power
GRID_HZ = 10.0  # linear frequency grid the spectra are made on
_LEVEL = 5.5  # natural-log offset: vowel peaks land near +5, quiet noise near -10
_CHUNK = 256  # utterances rendered together; fixed so output never depends on how callers batch
_STRESS_CODES = (None, "0", "1", "2")
_ASPIRATE = -2  # part row placeholder: aspiration shaped by the next phone


def hz_to_mel(f):
    """HTK mel scale, 2595 log10(1 + f / 700) (common practice).

    >>> round(float(hz_to_mel(700.0)), 2)
    781.17
    """
    return 2595.0 * np.log10(1.0 + np.asarray(f, dtype=np.float64) / 700.0)


def mel_to_hz(m):
    """Inverse of hz_to_mel.

    >>> round(float(mel_to_hz(hz_to_mel(1000.0))), 6)
    1000.0
    """
    return 700.0 * (10.0 ** (np.asarray(m, dtype=np.float64) / 2595.0) - 1.0)


def mel_filterbank(n_freqs: int, n_mels: int, sample_rate: int, f_min: float = 0.0, f_max: float | None = None):
    """Unnormalised triangular filters on HTK mel, (n_freqs, n_mels), for n_freqs points 0..sample_rate/2.

    >>> fb = mel_filterbank(257, 80, 16000)
    >>> fb.shape, float(fb.max()) <= 1.0
    ((257, 80), True)
    """
    f_max = sample_rate / 2 if f_max is None else f_max
    freqs = np.linspace(0.0, sample_rate // 2, n_freqs)[:, None]
    pts = mel_to_hz(np.linspace(hz_to_mel(f_min), hz_to_mel(f_max), n_mels + 2))
    rise = (freqs - pts[:-2]) / (pts[1:-1] - pts[:-2])
    fall = (pts[2:] - freqs) / (pts[2:] - pts[1:-1])
    return np.maximum(0.0, np.minimum(rise, fall))


@dataclass
class _Rows:
    """The parts of phonetics.parts_table() as arrays, one row per spectral target."""

    names: list
    formants: np.ndarray  # (R, 5) men's Hz; unused slots hold 1000 and are masked out
    log_ratio: np.ndarray  # (R, 5) log(women / men)
    bandwidths: np.ndarray
    mask: np.ndarray
    zero: np.ndarray  # (R,) antiresonance Hz
    voiced_db: np.ndarray  # (R,) nan = no such component
    natural: np.ndarray
    aspirated_db: np.ndarray
    band: np.ndarray  # (R, 4) low, high, low slope, high slope
    band_db: np.ndarray
    blend: np.ndarray
    noisy: np.ndarray
    glide: np.ndarray
    symbol_id: dict  # symbol -> id; PAUSE last
    part_row: np.ndarray  # (symbols, 4)
    part_frac: np.ndarray
    part_count: np.ndarray
    phone_ms: np.ndarray
    aspiration_row: np.ndarray  # (symbols,) aspiration row used before each symbol


def _build_rows() -> _Rows:
    parts, seq = ph.parts_table()
    names = list(parts)
    R = len(names)
    a = {k: np.zeros((R, 5)) for k in ("formants", "log_ratio", "bandwidths", "mask")}
    a["formants"][:], a["bandwidths"][:] = 1000.0, 100.0  # unused slots: harmless values, masked out
    one = {k: np.full(R, np.nan) for k in ("voiced_db", "aspirated_db", "band_db")}
    band, zero = np.ones((R, 4)), np.zeros(R)
    for i, p in enumerate(parts.values()):
        n = len(p.formants)
        women = p.women or tuple(f * WOMEN_VOCAL_TRACT for f in p.formants)
        a["formants"][i, :n], a["bandwidths"][i, :n], a["mask"][i, :n] = p.formants, p.bandwidths[:n], 1.0
        a["log_ratio"][i, :n] = np.log(np.divide(women, p.formants))
        for k in one:
            one[k][i] = np.nan if getattr(p, k) is None else getattr(p, k)
        if p.band is not None:
            band[i] = (p.band.low_hz, p.band.high_hz, p.band.low_slope_db, p.band.high_slope_db)
        zero[i] = p.antiresonance_hz
    symbols = [*ph.SYMBOLS, ph.PAUSE]
    part_row = np.zeros((len(symbols), 4), np.int64)
    part_ms = np.zeros((len(symbols), 4))
    for s, sym in enumerate(symbols):
        for j, (name, ms) in enumerate(seq[sym]):
            part_row[s, j] = _ASPIRATE if name == ph.NEXT else names.index(name)
            part_ms[s, j] = ms
    total = part_ms.sum(1)
    frac = np.where(total[:, None] > 0, part_ms / np.maximum(total, 1e-9)[:, None], 1.0)
    get = lambda k: np.array([getattr(p, k) for p in parts.values()])  # noqa: E731
    return _Rows(names, **a, zero=zero, **one, natural=get("natural_level"), band=band,
                 blend=get("blend"), noisy=get("noisy").astype(np.float32), glide=get("glide"),
                 symbol_id={s: i for i, s in enumerate(symbols)}, part_row=part_row, part_frac=frac,
                 part_count=np.array([len(seq[s]) for s in symbols]), phone_ms=total,
                 aspiration_row=np.array([names.index(ph.aspiration_part(s)) for s in symbols]))


def _resonances(grid, freq, bw, mask):
    """Summed log power gains of pole pairs (rows, k) at freq with bandwidth bw, each 1 at 0 Hz
    (the resonator of Klatt 1980); pairs where mask is 0 are left out. Returns (rows, grid)."""
    f = grid.astype(np.float32)[None, None, :]
    F, b2 = freq.astype(np.float32)[..., None], ((bw.astype(np.float32) / 2) ** 2)[..., None]
    # subtle: one log of the product of all pairs, each divided by its value at 0 Hz so the
    # float32 product stays within about 1e-30..1e30
    pair = ((f - F) ** 2 + b2) * ((f + F) ** 2 + b2) / (F ** 2 + b2) ** 2
    return -np.log(np.where(mask[..., None] > 0, pair, np.float32(1.0)).prod(1)).astype(np.float64)


def _harmonics(grid, f0: float, ripple: float):
    """Power of a harmonic source seen through a 25 ms Hamming window: Gaussian lines of about the
    window's 3 dB width (1.3 bins, Harris 1978, Proc. IEEE 66), mean 1, mixed with a smooth floor."""
    d = (grid + f0 / 2) % f0 - f0 / 2
    d = np.where(grid < f0 / 2, grid - f0, d)  # subtle: 0 Hz is no harmonic
    lines = np.exp(-(d ** 2) / (2 * 22.0 ** 2))
    return (1 - ripple) + ripple * lines / lines.mean()


def _psd(rows: _Rows, spk, scales, grid, vowel_scale: float):
    """Power density of every (row, formant scale) for one speaker, (R * V, grid)."""
    V, vt = len(scales), spk.vocal_tract
    # Men's table at vt 1, women's at WOMEN_VOCAL_TRACT, geometric in between, plain scaling outside.
    t = np.clip(np.log(vt) / np.log(WOMEN_VOCAL_TRACT), 0.0, 1.0)
    F = rows.formants * np.exp(t * rows.log_ratio) * (vt / WOMEN_VOCAL_TRACT ** t)
    F = (F[:, None, :] * scales[None, :, None]).reshape(-1, 5)
    rep = lambda x: np.repeat(x, V, axis=0)  # noqa: E731
    hz_scale = vt * np.tile(scales, len(rows.names))
    shape = _resonances(grid, F, rep(rows.bandwidths), rep(rows.mask))
    zero = rep(rows.zero) * hz_scale
    has = zero > 0
    shape[has] -= _resonances(grid, zero[has, None], np.full((has.sum(), 1), 100.0), np.ones((has.sum(), 1)))
    source = spk.tilt_db * DB * 0.5 * np.log2(1.0 + (grid / 100.0) ** 2)  # flat below ~100 Hz, then the tilt

    def level(psd, db, natural=None):
        total = psd.sum(1, keepdims=True) * GRID_HZ
        gain = np.where(np.isnan(db), 0.0, 10 ** (np.nan_to_num(db) / 10))[:, None]
        if natural is not None:
            return psd * gain * np.where(natural[:, None], vowel_scale, 1 / total)
        return psd * gain / total

    voiced = level(np.exp(shape + source) * _harmonics(grid, spk.pitch_hz, spk.ripple),
                   rep(rows.voiced_db), rep(rows.natural))
    aspirated = level(np.exp(shape), rep(rows.aspirated_db))
    lo, hi = rep(rows.band[:, 0]) * hz_scale, rep(rows.band[:, 1]) * hz_scale
    g = np.maximum(grid, GRID_HZ)[None, :]
    band_db = (-rep(rows.band[:, 2])[:, None] * np.maximum(0, np.log2(lo[:, None] / g))
               - rep(rows.band[:, 3])[:, None] * np.maximum(0, np.log2(g / hi[:, None])))
    band = level(np.exp(band_db * DB), rep(rows.band_db))
    return voiced + aspirated + band


def _vowel_scale(rows: _Rows, grid) -> float:
    """Factor giving the ten vowels of the canonical voice a mean power of one."""
    vowels = [rows.names.index(v) for v in ph.VOWEL_FORMANTS_MEN]
    psd = _psd(rows, Speaker(ripple=0.0), np.ones(1), grid, 1.0)[vowels]
    return 1.0 / float(psd.sum(1).mean() * GRID_HZ)


@dataclass
class AcousticConfig:
    n_mels: int = 80
    hop_ms: float = 10.0
    sample_rate: int = 16000
    snr_db: tuple[float, float] = (15.0, 35.0)  # additive noise SNR range per utterance (over its phone frames)
    rate_range: tuple[float, float] = (0.85, 1.2)  # speaking-rate factor per utterance; durations are divided by it
    duration_jitter: float = 0.2  # per-phone log-normal spread of durations (sigma of the log)
    coarticulation_ms: float = 30.0  # transition width between neighbouring phone targets
    pause_ms: tuple[float, float] = (60.0, 200.0)  # duration of a "pau" when realised
    pause_prob: float = 0.5  # chance a "pau" is realised as silence
    edge_silence_ms: tuple[float, float] = (40.0, 120.0)  # silence before and after each utterance
    spectral_jitter_db: float = 1.5  # frame-level random variation of the spectrum (std per mel bin)
    formant_spread: float = 0.04  # per-token formant scale drawn from 1 +- this
    formant_variants: int = 5  # precomputed formant scales in that range (memory grows with it)
    channel_tilt_db: float = 2.0  # per-utterance channel slope drawn from +- this, dB per octave around 1 kHz
    level_db: tuple[float, float] = (-6.0, 6.0)  # per-utterance gain
    female_share: float = 0.5  # share of female speakers made by make_speakers
    log_floor: float = -14.0  # features are log(power + exp(this)): never below it; natural log

    def __post_init__(self):
        for f in fields(self):
            v = getattr(self, f.name)
            if isinstance(v, list):
                setattr(self, f.name, v := tuple(v))  # YAML gives lists
            if isinstance(v, tuple) and (len(v) != 2 or v[0] > v[1]):
                raise ValueError(f"AcousticConfig.{f.name} must be a (low, high) pair with low <= high, got {v!r}")
        if self.n_mels < 1 or self.hop_ms <= 0 or self.sample_rate <= 0 or self.formant_variants < 1:
            raise ValueError("AcousticConfig: n_mels, hop_ms, sample_rate and formant_variants must be positive")
        if not 0.0 <= self.pause_prob <= 1.0:
            raise ValueError(f"AcousticConfig.pause_prob must lie in [0, 1], got {self.pause_prob}")
        if self.rate_range[0] <= 0:
            raise ValueError(f"AcousticConfig.rate_range must be positive, got {self.rate_range}")


@dataclass(frozen=True)
class Speaker:
    """One voice; everything about it is baked into the Renderer's templates."""

    vocal_tract: float = 1.0  # formant scale: 1 = Peterson & Barney men, WOMEN_VOCAL_TRACT = women
    pitch_hz: float = 120.0
    tilt_db: float = -6.0  # voice source slope in dB/octave: glottal -12, lip radiation +6 (common practice)
    loudness_db: float = 0.0
    rate: float = 1.0  # personal speaking-rate factor; durations are divided by it
    ripple: float = 0.8  # share of voiced power in resolved harmonics; 0 = smooth envelope
    female: bool = False


def make_speakers(n: int, rng: np.random.Generator, cfg: AcousticConfig) -> list[Speaker]:
    """Draw n speakers: a female/male mix with correlated pitch and vocal-tract length.

    Pitch means about 115 Hz for men and 205 Hz for women (common practice, from memory).
    """
    female = rng.random(n) < cfg.female_share
    vt = np.where(female, rng.normal(WOMEN_VOCAL_TRACT, 0.04, n), rng.normal(1.0, 0.04, n))
    vt = np.where(female, np.clip(vt, 1.06, 1.24), np.clip(vt, 0.86, 1.1))
    pitch = np.where(female, np.clip(rng.normal(205, 22, n), 150, 270), np.clip(rng.normal(115, 15, n), 80, 160))
    tilt = rng.normal(-6.0, 1.5, n)
    loud = rng.normal(0.0, 2.0, n)
    rate = np.clip(rng.normal(1.0, 0.06, n), 0.85, 1.15)
    ripple = rng.uniform(0.5, 0.9, n)
    return [Speaker(float(vt[i]), float(pitch[i]), float(tilt[i]), float(loud[i]), float(rate[i]),
                    float(ripple[i]), bool(female[i])) for i in range(n)]


class Renderer:
    """Phone sequences -> frames for a fixed set of speakers; spectra made once, here."""

    def __init__(self, cfg: AcousticConfig, speakers: list[Speaker]):
        if not speakers:
            raise ValueError("Renderer needs at least one speaker")
        self.cfg, self.speakers = cfg, list(speakers)
        nyq = cfg.sample_rate / 2
        grid = np.arange(0.0, nyq + GRID_HZ / 2, GRID_HZ)
        fb = mel_filterbank(len(grid), cfg.n_mels, cfg.sample_rate)  # (grid, M)
        self.rows = rows = _build_rows()
        V = cfg.formant_variants
        scales = np.linspace(1 - cfg.formant_spread, 1 + cfg.formant_spread, V) if V > 1 else np.ones(1)
        # subtle: one vowel scale for all speakers, so loudness and tilt differences survive
        vowel_scale = _vowel_scale(rows, grid)
        mel = [_psd(rows, s, scales, grid, vowel_scale) @ fb * GRID_HZ for s in self.speakers]
        loud = np.repeat([s.loudness_db * DB for s in self.speakers], len(rows.names) * V)[:, None]
        self.templates = (np.log(np.concatenate(mel) + 1e-30) + loud + _LEVEL).astype(np.float32)  # (S*R*V, M)
        vowels = np.isin(np.arange(len(rows.names) * V) // V, [rows.names.index(v) for v in ph.VOWEL_FORMANTS_MEN])
        self._ref_power = float(np.exp(self.templates[: len(vowels)][vowels]).sum(1).mean())
        # Pinkish noise (power density ~ 1/f above 100 Hz) projected to mel, summing to one.
        noise = (1.0 / np.maximum(grid, 100.0)) @ fb
        self._log_noise = np.log(noise / noise.sum()).astype(np.float32)
        # Periodogram spread per mel bin: a filter spanning k independent 512-point FFT bins averages
        # k exponential (chi-square, 2 dof) powers; var(log) = trigamma(k) ~ 1/k + 1/(2k^2) + 1/(6k^3).
        fft_fb = mel_filterbank(257, cfg.n_mels, cfg.sample_rate)
        k = np.maximum(fft_fb.sum(0) ** 2 / np.maximum((fft_fb ** 2).sum(0), 1e-12), 1.0)
        self._spread = np.sqrt(1 / k + 1 / (2 * k ** 2) + 1 / (6 * k ** 3)).astype(np.float32)
        centres = mel_to_hz(np.linspace(0.0, hz_to_mel(nyq), cfg.n_mels + 2)[1:-1])
        self._octaves = np.log2(np.maximum(centres, 125.0) / 1000.0)  # for channel tilt
        self._codes: dict[str, int] = {}

    def _code(self, utterances, flat: list[str]) -> np.ndarray:
        """Phone strings -> sym * 4 + stress index; errors name the utterance and position."""
        codes = [self._codes.get(p) for p in flat]
        if None in codes:
            for i, utt in enumerate(utterances):
                for j, p in enumerate(utt):
                    if p not in self._codes:
                        try:
                            sym, stress = ph.split_stress(p, allow_pause=True)
                        except ValueError as err:
                            raise ValueError(f"utterance {i}, phone {j}: {err}") from None
                        self._codes[p] = self.rows.symbol_id[sym] * 4 + _STRESS_CODES.index(stress)
            codes = [self._codes[p] for p in flat]
        return np.asarray(codes, np.int64)

    def render(self, utterances: list[list[str]], speaker_ids: list[int], rng: np.random.Generator
               ) -> tuple[list[np.ndarray], list[np.ndarray]]:
        """Returns per utterance: features float32 (T_i, n_mels) natural-log mel power (floored, no
        normalisation), and int32 phone start frames of length len(phones_i)+1 (the last entry = end
        frame of the last phone; "pau" counts as a phone entry even if not realised)."""
        if len(utterances) != len(speaker_ids):
            raise ValueError(f"got {len(utterances)} utterances but {len(speaker_ids)} speaker ids")
        bad = [s for s in speaker_ids if not 0 <= int(s) < len(self.speakers)]
        if bad:
            raise ValueError(f"speaker id {bad[0]} is outside 0..{len(self.speakers) - 1}")
        feats, starts = [], []
        for lo in range(0, len(utterances), _CHUNK):
            f, s = self._render_chunk(utterances[lo:lo + _CHUNK], speaker_ids[lo:lo + _CHUNK], rng)
            feats += f
            starts += s
        return feats, starts

    def _timeline(self, utts, spk, rng):
        """Draw durations and lay every part on the frame grid.

        Slots are, per utterance, a leading edge silence, the phones and a trailing edge
        silence; each slot expands into its parts (none for an unrealised pause).
        """
        cfg, rows = self.cfg, self.rows
        n_u = len(utts)
        lens = np.fromiter(map(len, utts), np.int64, n_u)
        codes = self._code(utts, list(itertools.chain.from_iterable(utts)))
        n_s = len(codes) + 2 * n_u
        slot_utt = np.repeat(np.arange(n_u), lens + 2)
        lead = np.cumsum(lens + 2) - lens - 2
        trail = lead + lens + 1
        is_phone = np.ones(n_s, bool)
        is_phone[lead] = is_phone[trail] = False
        slot_sym = np.full(n_s, rows.symbol_id[ph.PAUSE])
        slot_sym[is_phone] = codes // 4
        slot_stress = np.zeros(n_s, np.int64)
        slot_stress[is_phone] = codes % 4

        # Draws always in this order (determinism).
        rate = rng.uniform(*cfg.rate_range, n_u) * np.array([s.rate for s in self.speakers])[spk]
        edges = rng.uniform(*cfg.edge_silence_ms, (n_u, 2))
        jitter = np.exp(cfg.duration_jitter * rng.standard_normal(n_s))
        pause_on = rng.random(n_s) < cfg.pause_prob
        pause_len = rng.uniform(*cfg.pause_ms, n_s)
        variant = rng.integers(0, cfg.formant_variants, n_s)

        stress_factor = np.array([ph.STRESS_DURATION[s] for s in _STRESS_CODES])
        ms = rows.phone_ms[slot_sym] * stress_factor[slot_stress] * jitter / rate[slot_utt]
        ms = np.where(slot_sym == rows.symbol_id[ph.PAUSE], np.where(pause_on, pause_len, 0.0), ms)
        ms[lead], ms[trail] = edges[:, 0], edges[:, 1]
        count = rows.part_count[slot_sym] * ((ms > 0) | ~is_phone)  # edges always; unrealised pauses never
        first = np.cumsum(count) - count  # first part of each slot (the next part for an empty slot)
        part_slot = np.repeat(np.arange(n_s), count)
        k = np.arange(len(part_slot)) - first[part_slot]
        psym = slot_sym[part_slot]
        row = rows.part_row[psym, k]
        nxt = slot_sym[np.minimum(part_slot + 1, n_s - 1)]
        row = np.where(row == _ASPIRATE, rows.aspiration_row[nxt], row)
        dur = np.maximum(ms[part_slot] * rows.part_frac[psym, k] / cfg.hop_ms, 1.0 + 1e-6)  # frames

        fp, lp = first[lead], first[trail]
        cum = np.cumsum(dur)
        end = cum - (cum[fp] - dur[fp])[slot_utt[part_slot]]  # frames from the utterance start
        start = end - dur
        # subtle: the utterance ends on a whole frame, and the trailing silence keeps at least one frame
        n_frames = np.maximum(np.round(end[lp]), np.ceil(start[lp] - 0.5) + 1).astype(np.int64)
        end[lp] = n_frames
        # Frame t (centre t + 0.5) belongs to the part whose [start, end) holds its centre.
        s_int = np.ceil(start - 0.5).astype(np.int64)
        e_int = np.append(s_int[1:], 0)
        e_int[lp] = n_frames
        not_lead = np.ones(n_s, bool)
        not_lead[lead] = False
        starts = np.split(s_int[first[not_lead]].astype(np.int32), np.cumsum(lens + 1)[:-1])
        return dict(part_slot=part_slot, row=row, dur=dur, start=start, end=end, s_int=s_int,
                    per_part=e_int - s_int, fp=fp, lp=lp, n_frames=n_frames, starts=starts,
                    utt=slot_utt[part_slot], speech=is_phone[part_slot], variant=variant[part_slot])

    def _render_chunk(self, utts, speaker_ids, rng):
        cfg, rows, M = self.cfg, self.rows, self.cfg.n_mels
        n_u = len(utts)
        spk = np.asarray(speaker_ids, np.int64)
        p = self._timeline(utts, spk, rng)
        snr = rng.uniform(*cfg.snr_db, n_u)
        gain = rng.uniform(*cfg.level_db, n_u)
        tilt = rng.uniform(-cfg.channel_tilt_db, cfg.channel_tilt_db, n_u)
        per_part, dur, start, end = p["per_part"], p["dur"], p["start"], p["end"]
        n_p = len(dur)
        pf = np.repeat(np.arange(n_p), per_part)  # part of each frame, (F,)
        centre = p["s_int"][pf] + (np.arange(len(pf)) - np.repeat(np.cumsum(per_part) - per_part, per_part)) + 0.5

        # Coarticulation: blend each frame with its nearer neighbour part; the blend is 1/2 at the
        # boundary and 0 at half the boundary's width away. Glide steps of one diphthong blend
        # centre to centre.
        blend = rows.blend[p["row"]]
        width = np.zeros(n_p)
        width[1:] = cfg.coarticulation_ms / cfg.hop_ms * np.minimum(blend[1:], blend[:-1])
        glide = np.zeros(n_p, bool)
        glide[1:] = rows.glide[p["row"][1:]] & (p["part_slot"][1:] == p["part_slot"][:-1])
        width[glide] = np.minimum(dur[1:], dur[:-1])[glide[1:]]
        width[p["fp"]] = 0.0
        width_right = np.append(width[1:], 0.0)
        width_right[p["lp"]] = 0.0
        w_left = np.clip(0.5 - (centre - start[pf]) / np.maximum(width[pf], 1e-9), 0.0, 0.5)
        w_right = np.clip(0.5 - (end[pf] - centre) / np.maximum(width_right[pf], 1e-9), 0.0, 0.5)
        go_right = w_right >= w_left
        other = np.clip(pf + np.where(go_right, 1, -1), 0, n_p - 1)
        w = np.where(go_right, w_right, w_left).astype(np.float32)
        flat_row = (spk[p["utt"]] * len(rows.names) + p["row"]) * cfg.formant_variants + p["variant"]
        x = np.take(self.templates, flat_row[pf], axis=0)  # (F, M) log power
        d = np.take(self.templates, flat_row[other], axis=0)
        d -= x
        d *= w[:, None]
        x += d

        # subtle: frame-level randomness comes from random M-wide windows into one fresh bank of
        # normal draws (8 per frame), twenty times cheaper than a draw per value; overlapping
        # windows are rare and carry no phone information.
        n_f = len(pf)
        bank = rng.standard_normal(max(8 * n_f, 4 * M), dtype=np.float32)
        windows = np.lib.stride_tricks.sliding_window_view(bank, M)
        offsets = rng.integers(0, len(windows), (2, n_f))
        frame_utt = np.repeat(np.arange(n_u), p["n_frames"])
        channel = ((tilt[:, None] * self._octaves[None, :] + gain[:, None]) * DB).astype(np.float32)
        x += np.take(channel, frame_utt, axis=0)
        z = windows[offsets[0]]
        sd = np.multiply.outer(rows.noisy[p["row"][pf]], self._spread)
        sd += np.float32(cfg.spectral_jitter_db * DB)
        z *= sd
        x += z
        np.exp(x, out=x)  # power

        # Noise: level from the mean power of the utterance's phone frames and its SNR.
        on = p["speech"][pf].astype(np.float64)
        num = np.bincount(frame_utt, x.sum(1) * on, n_u)
        den = np.bincount(frame_utt, on, n_u)
        ref = np.where(den > 0, num / np.maximum(den, 1), self._ref_power * np.exp(gain * DB))
        noise_rows = (self._log_noise - self._spread ** 2 / 2)[None, :] + np.log(ref / 10 ** (snr / 10))[:, None]
        y = windows[offsets[1]]
        y *= self._spread  # periodogram-like spread, mean-preserving
        y += np.take(noise_rows.astype(np.float32), frame_utt, axis=0)
        np.exp(y, out=y)
        x += y
        x += np.float32(np.exp(cfg.log_floor))  # a soft floor: features never fall below log_floor
        np.log(x, out=x)
        return np.split(x, np.cumsum(p["n_frames"])[:-1]), p["starts"]


def expected_frames(utterances: list[list[str]], cfg: AcousticConfig) -> float:
    """The mean total of frames `Renderer.render` makes for these phone sequences: its duration draws
    at their means (log-normal jitter exp(sigma^2 / 2); uniform rate on [a, b]: E[1/rate] =
    ln(b / a) / (b - a); speakers' own rates, centred on 1, taken as 1). For disk-space checks
    before anything is rendered; the one-frame floor of very short parts is left out.

    >>> cfg = AcousticConfig(rate_range=(1.0, 1.0), duration_jitter=0.0, edge_silence_ms=(50.0, 50.0))
    >>> expected_frames([[]], cfg)  # an empty utterance is its two edge silences, 50 ms each
    10.0
    """
    rows = _build_rows()
    lo, hi = cfg.rate_range
    inv_rate = np.log(hi / lo) / (hi - lo) if hi > lo else 1.0 / lo
    phone_ms = 0.0
    for utt in utterances:
        for p in utt:
            if p == ph.PAUSE:
                phone_ms += cfg.pause_prob * (cfg.pause_ms[0] + cfg.pause_ms[1]) / 2
            else:
                sym, stress = ph.split_stress(p, allow_pause=True)
                phone_ms += rows.phone_ms[rows.symbol_id[sym]] * ph.STRESS_DURATION[stress] \
                    * np.exp(cfg.duration_jitter ** 2 / 2) * inv_rate
    edges_ms = len(utterances) * (cfg.edge_silence_ms[0] + cfg.edge_silence_ms[1])
    return float((phone_ms + edges_ms) / cfg.hop_ms)
