"""Acoustic-phonetic facts about the 39 ARPAbet phones: classes, targets, cues, durations.

This module holds numbers only; `acoustics.py` turns them into spectra. Every
frequency is for an adult male voice (vocal-tract factor 1); the renderer
scales them per speaker. Values marked "from memory" are textbook figures
recalled, not copied from a table at hand, and are meant as plausible
averages, not as measurements.

This module deliberately knows nothing about mel bins, frames or noise.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

PAUSE = "pau"  # phrase boundary inserted by the sentence maker; may become a short silence

# Peterson & Barney (1952), JASA 24, "Control methods used in a study of the
# vowels": average F1, F2, F3 in Hz of the ten vowels in /hVd/ words, men and
# women. From memory.
VOWEL_FORMANTS_MEN: dict[str, tuple[float, float, float]] = {
    "IY": (270, 2290, 3010), "IH": (390, 1990, 2550), "EH": (530, 1840, 2480),
    "AE": (660, 1720, 2410), "AH": (520, 1190, 2390), "AA": (730, 1090, 2440),
    "AO": (570, 840, 2410), "UH": (440, 1020, 2240), "UW": (300, 870, 2240),
    "ER": (490, 1350, 1690),
}
VOWEL_FORMANTS_WOMEN: dict[str, tuple[float, float, float]] = {
    "IY": (310, 2790, 3310), "IH": (430, 2480, 3070), "EH": (610, 2330, 2990),
    "AE": (860, 2050, 2850), "AH": (760, 1400, 2780), "AA": (850, 1220, 2810),
    "AO": (590, 920, 2710), "UH": (470, 1160, 2680), "UW": (370, 950, 2670),
    "ER": (500, 1640, 1960),
}

# Formant scale that turns the men's averages into the women's: the geometric
# mean of the thirty F1-F3 ratios above (about 1.17).
WOMEN_VOCAL_TRACT = math.exp(sum(math.log(w / m) for v in VOWEL_FORMANTS_MEN
                                 for m, w in zip(VOWEL_FORMANTS_MEN[v], VOWEL_FORMANTS_WOMEN[v])) / 30)

# Diphthongs glide from one monophthong target to another (common textbook
# description); the glide of AY stops short of IY, so it ends at IH.
DIPHTHONG_GLIDES: dict[str, tuple[str, str]] = {
    "EY": ("EH", "IY"), "AY": ("AA", "IH"), "AW": ("AA", "UH"), "OY": ("AO", "IY"), "OW": ("AO", "UW"),
}

# F4 and F5 of a uniform 17.5 cm tube closed at one end: (2n - 1) * 500 Hz (common practice).
HIGH_FORMANTS = (3500.0, 4500.0)
# Formant bandwidths F1..F5 in Hz, typical values (common practice, from memory).
BANDWIDTHS = (80.0, 100.0, 150.0, 250.0, 300.0)
NEUTRAL_FORMANTS = (500.0, 1500.0, 2500.0)  # schwa-like tube, for aspiration before a non-sonorant

# Liquids and glides, F1-F3 in Hz (common textbook values, from memory): R has
# the lowest F3 of English, L a high F3, W low F1 and F2, Y a very high F2.
APPROXIMANT_FORMANTS: dict[str, tuple[float, float, float]] = {
    "R": (310, 1060, 1380), "L": (360, 1150, 2750), "W": (300, 610, 2200), "Y": (260, 2070, 3020),
}

# Nasal murmur: a strong low resonance near 250 Hz, weak wide upper resonances
# and an antiresonance whose frequency rises from M to N to NG (Fujimura 1962,
# JASA 34; values from memory). (poles in Hz, antiresonance in Hz)
NASAL_MURMUR: dict[str, tuple[tuple[float, float, float, float], float]] = {
    "M": ((250, 1350, 2300, 3300), 1000), "N": ((250, 1550, 2400, 3300), 1800),
    "NG": ((250, 1150, 2200, 3300), 3100),
}


@dataclass(frozen=True)
class NoiseBand:
    """A noise spectrum: flat between `low_hz` and `high_hz`, falling outside by the slopes (dB/octave)."""

    low_hz: float
    high_hz: float
    low_slope_db: float
    high_slope_db: float


# Fricative noise by place (common practice, from memory): alveolar s/z
# strongest at 4-8 kHz, postalveolar sh/zh at 2.5-4 kHz, labiodental and
# dental f/v/th/dh weak and nearly flat.
FRICATIVE_NOISE: dict[str, NoiseBand] = {
    "alveolar": NoiseBand(4000, 8000, 30, 6),
    "postalveolar": NoiseBand(2300, 4500, 30, 24),
    "labiodental": NoiseBand(900, 8000, 4, 0),
    "dental": NoiseBand(1500, 8000, 5, 0),
}
# Stop bursts by place after Stevens & Blumstein (1978), JASA 64, "Invariant cues
# for place of articulation in stop consonants": labial diffuse-falling,
# alveolar diffuse-rising, velar compact at mid frequencies. Bands from memory.
BURST_NOISE: dict[str, NoiseBand] = {
    "labial": NoiseBand(300, 1200, 6, 10),
    "alveolar": NoiseBand(3500, 8000, 15, 0),
    "velar": NoiseBand(1600, 2500, 20, 20),
    "postalveolar": NoiseBand(2500, 5000, 20, 8),
}

# Levels in dB: power of each part summed over 0-8 kHz, against the mean power
# of the ten vowels. Orderings follow Fletcher's relative phonetic powers
# (Fletcher 1953, "Speech and hearing in communication"; from memory, adapted):
# sh strongest of the obstruents, s next, f and th weakest; nasals and liquids a
# few dB under vowels; voiced fricatives trade frication for voicing.
FRICATION_DB = {"S": -12, "Z": -18, "SH": -9, "ZH": -15, "F": -21, "V": -26, "TH": -25, "DH": -29}
VOICING_DB = {"Z": -17, "ZH": -17, "V": -16, "DH": -16, "closure": -25}  # low voice bar near 250 Hz
BURST_DB = {"P": -13, "T": -9, "K": -10, "B": -16, "D": -12, "G": -13, "CH": -9, "JH": -13}
ASPIRATION_DB = -13.0
SONORANT_DB = {"M": -11, "N": -13, "NG": -10, "R": -5, "L": -8, "W": -6, "Y": -7}

# Parts of stops and affricates in ms: closure, burst, then voice onset time
# (aspiration) for voiceless stops or frication for affricates. VOT after
# Lisker & Abramson (1964), Word 20, shortened for running speech (from memory).
STOP_PARTS_MS: dict[str, tuple[float, ...]] = {
    "P": (45, 12, 35), "T": (45, 12, 40), "K": (45, 12, 45),
    "B": (45, 12), "D": (45, 12), "G": (45, 12),
    "CH": (40, 10, 70), "JH": (35, 10, 50),
}


@dataclass(frozen=True)
class Phone:
    symbol: str
    kind: str  # vowel, diphthong, stop, affricate, fricative, nasal, liquid, glide, h
    voiced: bool
    place: str  # "" for vowels
    duration_ms: float  # mean duration in read connected speech (common practice, from memory)


def _table() -> dict[str, Phone]:
    rows = [
        # vowels and diphthongs
        ("IY", "vowel", 1, "", 95), ("IH", "vowel", 1, "", 65), ("EH", "vowel", 1, "", 80),
        ("AE", "vowel", 1, "", 110), ("AH", "vowel", 1, "", 65), ("AA", "vowel", 1, "", 110),
        ("AO", "vowel", 1, "", 110), ("UH", "vowel", 1, "", 70), ("UW", "vowel", 1, "", 95),
        ("ER", "vowel", 1, "", 95), ("EY", "diphthong", 1, "", 120), ("AY", "diphthong", 1, "", 140),
        ("AW", "diphthong", 1, "", 150), ("OY", "diphthong", 1, "", 150), ("OW", "diphthong", 1, "", 120),
        # stops and affricates (durations are the sums of their parts)
        ("P", "stop", 0, "labial", 0), ("B", "stop", 1, "labial", 0), ("T", "stop", 0, "alveolar", 0),
        ("D", "stop", 1, "alveolar", 0), ("K", "stop", 0, "velar", 0), ("G", "stop", 1, "velar", 0),
        ("CH", "affricate", 0, "postalveolar", 0), ("JH", "affricate", 1, "postalveolar", 0),
        # fricatives and h
        ("F", "fricative", 0, "labiodental", 90), ("V", "fricative", 1, "labiodental", 55),
        ("TH", "fricative", 0, "dental", 85), ("DH", "fricative", 1, "dental", 40),
        ("S", "fricative", 0, "alveolar", 100), ("Z", "fricative", 1, "alveolar", 75),
        ("SH", "fricative", 0, "postalveolar", 105), ("ZH", "fricative", 1, "postalveolar", 70),
        ("HH", "h", 0, "glottal", 60),
        # nasals, liquids, glides
        ("M", "nasal", 1, "labial", 65), ("N", "nasal", 1, "alveolar", 60), ("NG", "nasal", 1, "velar", 70),
        ("L", "liquid", 1, "alveolar", 60), ("R", "liquid", 1, "postalveolar", 60),
        ("W", "glide", 1, "labial", 55), ("Y", "glide", 1, "palatal", 50),
    ]
    out = {}
    for sym, kind, voiced, place, dur in rows:
        dur = sum(STOP_PARTS_MS[sym]) if sym in STOP_PARTS_MS else dur
        out[sym] = Phone(sym, kind, bool(voiced), place, float(dur))
    return out


PHONES: dict[str, Phone] = _table()
SYMBOLS: tuple[str, ...] = tuple(PHONES)  # the 39 ARPAbet phones, in table order
# Lexical stress on vowels: duration factor by stress digit (None = no digit); kept mild.
STRESS_DURATION = {None: 1.0, "0": 0.8, "1": 1.1, "2": 1.0}


def split_stress(p: str, allow_pause: bool = False) -> tuple[str, str | None]:
    """Symbol without stress digit, and the digit (or None). Case is ignored.

    >>> split_stress("ah0")
    ('AH', '0')
    >>> split_stress("pau", allow_pause=True)
    ('pau', None)
    """
    if not isinstance(p, str):
        raise ValueError(f"phone symbols are strings; got {p!r} of type {type(p).__name__}")
    if allow_pause and p.lower() == PAUSE:
        return PAUSE, None
    sym, stress = p.upper(), None
    if sym[-1:] in ("0", "1", "2"):
        sym, stress = sym[:-1], sym[-1]
    if sym not in PHONES or (stress is not None and PHONES[sym].kind not in ("vowel", "diphthong")):
        extra = f" or the pause symbol '{PAUSE}'" if allow_pause else ""
        raise ValueError(
            f"unknown ARPAbet symbol {p!r}: expected one of {' '.join(SYMBOLS)}{extra} "
            "(vowels may carry a stress digit 0, 1 or 2)"
        )
    return sym, stress


def phone_symbol(p: str, allow_pause: bool = False) -> str:
    """Validate an ARPAbet phone and strip its stress digit.

    >>> phone_symbol("AY1")
    'AY'
    >>> phone_symbol("XX")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    ValueError: unknown ARPAbet symbol 'XX': expected one of IY IH ... W Y (vowels may carry a stress digit 0, 1 or 2)
    """
    return split_stress(p, allow_pause)[0]


@dataclass(frozen=True)
class Part:
    """One spectral target: voicing and/or aspiration through resonances, and/or a noise band.

    Levels are dB against the mean vowel power (see FRICATION_DB); vowels keep
    the level their resonances give (natural_level).
    """

    formants: tuple[float, ...] = ()  # men's Hz, at most five
    women: tuple[float, ...] = ()  # women's Hz for the same formants; () means men's * WOMEN_VOCAL_TRACT
    bandwidths: tuple[float, ...] = BANDWIDTHS
    antiresonance_hz: float = 0.0  # 0 = none
    voiced_db: float | None = None  # harmonic source through the formants
    natural_level: bool = False
    aspirated_db: float | None = None  # noise source through the formants
    band: NoiseBand | None = None
    band_db: float | None = None
    blend: float = 1.0  # share of the coarticulation width used at its edges (small = abrupt)
    noisy: float = 0.0  # weight of noise-like frame-to-frame fluctuation
    glide: bool = False  # consecutive glide parts of one phone blend from centre to centre


NEXT = "next"  # part name meaning: aspiration shaped by the following phone
_ASPIRATION_WIDENING = (3.0, 1.5, 1.5, 1.5, 1.5)  # open glottis damps F1 most (common practice)


def _five(f3: tuple[float, ...], women: bool = False) -> tuple[float, ...]:
    return tuple(f3) + tuple(h * (WOMEN_VOCAL_TRACT if women else 1.0) for h in HIGH_FORMANTS)


def _targets(sym: str) -> tuple[tuple[float, ...], tuple[float, ...]] | None:
    """(men, women) five-formant targets a following aspiration takes its shape from."""
    if sym in VOWEL_FORMANTS_MEN:
        return _five(VOWEL_FORMANTS_MEN[sym]), _five(VOWEL_FORMANTS_WOMEN[sym], True)
    if sym in DIPHTHONG_GLIDES:
        return _targets(DIPHTHONG_GLIDES[sym][0])
    if sym in APPROXIMANT_FORMANTS:
        return _five(APPROXIMANT_FORMANTS[sym]), ()
    return None


def aspiration_part(sym: str) -> str:
    """Name of the aspiration part used before `sym` (neutral tube when `sym` has no formant target)."""
    return f"asp.{sym}" if _targets(sym) else "asp.neutral"


def parts_table() -> tuple[dict[str, Part], dict[str, list[tuple[str, float]]]]:
    """Every spectral target by name, and each phone (and PAUSE) as a list of (part name, mean ms)."""
    parts: dict[str, Part] = {"silence": Part(blend=0.5)}
    bar = dict(formants=(250.0,), bandwidths=(120.0,))
    parts["closure.voiced"] = Part(**bar, voiced_db=VOICING_DB["closure"], blend=0.3)
    parts["closure"] = Part(blend=0.3)
    seq: dict[str, list[tuple[str, float]]] = {PAUSE: [("silence", 0.0)]}
    for sym, info in PHONES.items():
        if info.kind == "vowel":
            parts[sym] = Part(_five(VOWEL_FORMANTS_MEN[sym]), _five(VOWEL_FORMANTS_WOMEN[sym], True),
                              voiced_db=0.0, natural_level=True)
            seq[sym] = [(sym, info.duration_ms)]
        elif info.kind == "diphthong":
            a, b = DIPHTHONG_GLIDES[sym]
            seq[sym] = []
            for j in range(4):  # four glide steps, blended centre to centre
                t = j / 3
                men = tuple(x ** (1 - t) * y ** t for x, y in zip(_five(VOWEL_FORMANTS_MEN[a]), _five(VOWEL_FORMANTS_MEN[b])))
                wom = tuple(x ** (1 - t) * y ** t for x, y in zip(_five(VOWEL_FORMANTS_WOMEN[a], True),
                                                                  _five(VOWEL_FORMANTS_WOMEN[b], True)))
                parts[f"{sym}.{j}"] = Part(men, wom, voiced_db=0.0, natural_level=True, glide=True)
                seq[sym].append((f"{sym}.{j}", info.duration_ms / 4))
        elif info.kind in ("stop", "affricate"):
            place = info.place
            parts[f"{sym}.burst"] = Part(**(bar if info.voiced else {}), band=BURST_NOISE[place],
                                         band_db=BURST_DB[sym], voiced_db=VOICING_DB["closure"] if info.voiced else None,
                                         blend=0.1, noisy=1.0)
            ms = STOP_PARTS_MS[sym]
            seq[sym] = [("closure.voiced" if info.voiced else "closure", ms[0]), (f"{sym}.burst", ms[1])]
            if info.kind == "affricate":
                seq[sym].append(("ZH" if info.voiced else "SH", ms[2]))
            elif not info.voiced:
                seq[sym].append((NEXT, ms[2]))
        elif info.kind == "fricative":
            parts[sym] = Part(**(bar if info.voiced else {}), band=FRICATIVE_NOISE[info.place],
                              band_db=FRICATION_DB[sym], voiced_db=VOICING_DB.get(sym), blend=0.5,
                              noisy=0.7 if info.voiced else 1.0)
            seq[sym] = [(sym, info.duration_ms)]
        elif info.kind == "nasal":
            poles, zero = NASAL_MURMUR[sym]
            parts[sym] = Part(tuple(map(float, poles)), bandwidths=(100.0, 200.0, 300.0, 400.0),
                              antiresonance_hz=float(zero), voiced_db=SONORANT_DB[sym], blend=0.7)
            seq[sym] = [(sym, info.duration_ms)]
        elif info.kind in ("liquid", "glide"):
            parts[sym] = Part(_five(APPROXIMANT_FORMANTS[sym]), voiced_db=SONORANT_DB[sym])
            seq[sym] = [(sym, info.duration_ms)]
        else:  # h: aspiration shaped by the next phone
            seq[sym] = [(NEXT, info.duration_ms)]
    wide = tuple(b * k for b, k in zip(BANDWIDTHS, _ASPIRATION_WIDENING))
    for sym in [*PHONES, "neutral"]:
        men_women = _targets(sym) if sym != "neutral" else (_five(NEUTRAL_FORMANTS), ())
        if men_women:
            parts[f"asp.{sym}"] = Part(*men_women, bandwidths=wide, aspirated_db=ASPIRATION_DB, blend=0.6, noisy=1.0)
    return parts, seq
