"""A voice that is not ours: the scenario's sentences spoken by espeak-ng (a system package).

`speak_corpus(cfg, out, voice=EspeakVoice)` writes the same utterances, splits,
exposures and lists as the built-in corpus of those settings, spoken by
espeak-ng's English voices and variants at spread rates and pitches. Common
words are read by espeak-ng from its own dictionary; rare words (invented
names, compounds, rare dictionary words) are spoken from their ARPAbet phones,
given to espeak-ng as phoneme input `[[...]]` in its own phoneme mnemonics
(`arpabet_to_espeak`). Training and held-out speakers use disjoint
voice+variant pairs. Output: 16 kHz 16-bit WAV (espeak-ng's 22,050 Hz
resampled with torchaudio), speech set to -23 dBFS RMS +- the corpus's gain range.

Install espeak-ng with the system package manager, e.g. `apt-get install espeak-ng`.
"""

from __future__ import annotations

import io
import shutil
import subprocess
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from tinyrnnt.config import ConfigError
from tinyrnnt.synth.phonetics import split_stress

VOICES = ("en-us", "en-gb", "en-gb-scotland", "en-gb-x-rp", "en-gb-x-gbclan", "en-gb-x-gbcwmd", "en-029",
          "en-us-nyc")
VARIANTS = ("m1", "m2", "m3", "m4", "m5", "m6", "m7", "f1", "f2", "f3", "f4", "f5")
RATE_WPM = (140, 200)  # espeak-ng's -s
PITCH = (30, 70)  # espeak-ng's -p, 0..99 (50 is the voice's own)
SAMPLE_RATE = 16000

# ARPAbet -> espeak-ng's English phoneme mnemonics (its phoneme-input notation, as `espeak-ng -x`
# prints them: e.g. "call" k'O:l, "judge" dZ'VdZ). AH and ER differ by stress: the stressed
# vowel of "cut" is V, unstressed AH the schwa @; stressed ER is 3:, unstressed 3.
ARPABET_TO_ESPEAK = {
    "AA": "A:", "AE": "a", "AH": "V", "AO": "O:", "AW": "aU", "AY": "aI", "EH": "E", "ER": "3:", "EY": "eI",
    "IH": "I", "IY": "i:", "OW": "oU", "OY": "OI", "UH": "U", "UW": "u:",
    "B": "b", "CH": "tS", "D": "d", "DH": "D", "F": "f", "G": "g", "HH": "h", "JH": "dZ", "K": "k", "L": "l",
    "M": "m", "N": "n", "NG": "N", "P": "p", "R": "r", "S": "s", "SH": "S", "T": "t", "TH": "T", "V": "v",
    "W": "w", "Y": "j", "Z": "z", "ZH": "Z",
}
UNSTRESSED = {"AH": "@", "ER": "3"}
STRESS_MARK = {"1": "'", "2": ","}


class EspeakMissing(ConfigError):
    """espeak-ng is not installed."""


def espeak_path() -> str:
    path = shutil.which("espeak-ng")
    if path is None:
        raise EspeakMissing("espeak-ng is not installed; install the system package, e.g. "
                            "`apt-get install espeak-ng` (Debian, Ubuntu) or `dnf install espeak-ng` (Fedora)")
    return path


def arpabet_to_espeak(phones: list[str]) -> str:
    """ARPAbet phones (stress digits on vowels) -> espeak-ng phoneme input, stress marks before
    the stressed vowel as espeak-ng writes them; pauses are dropped.

    >>> arpabet_to_espeak(["JH", "AH1", "JH"])
    "dZ'VdZ"
    >>> arpabet_to_espeak(["M", "AA1", "R", "AH0", "N"])
    "m'A:r@n"
    """
    out = []
    for p in phones:
        sym, stress = split_stress(p, allow_pause=True)
        if sym == "pau":
            continue
        if stress == "0" and sym in UNSTRESSED:
            out.append(UNSTRESSED[sym])
            continue
        out.append(STRESS_MARK.get(stress, "") + ARPABET_TO_ESPEAK[sym])
    return "".join(out)


def espeak_text(words: list[str], spans: list[dict], phones_of: dict[str, list[str]]) -> str:
    """The sentence as espeak-ng input: rare words (spans) as phoneme input, the rest as text.

    >>> espeak_text(["call", "maren"], [{"index": 1, "word": "maren"}], {"maren": ["M", "AA1", "R", "AH0", "N"]})
    "call [[m'A:r@n]]"
    """
    rare = {sp["index"]: sp["word"] for sp in spans}
    return " ".join(f"[[{arpabet_to_espeak(phones_of[rare[i]])}]]" if i in rare else w for i, w in enumerate(words))


def speaker_table(n_train: int, n_heldout: int, seed: int) -> list[dict]:
    """Speakers as (voice, variant, rate, pitch): the first n_train for training, then the held-out
    ones, whose voice+variant pairs training never uses."""
    rng = np.random.default_rng([seed, 23])
    pairs = [(v, w) for v in VOICES for w in VARIANTS]
    pairs = [pairs[i] for i in rng.permutation(len(pairs))]
    held = max(1, min(n_heldout, len(pairs) // 4))  # held-out pairs: a quarter at most, reused if needed
    held_pairs, train_pairs = pairs[:held], pairs[held:]
    out = []
    for i in range(n_train + n_heldout):
        voice, variant = (train_pairs[i % len(train_pairs)] if i < n_train else held_pairs[(i - n_train) % held])
        out.append({"voice": voice, "variant": variant, "rate": int(rng.integers(*RATE_WPM)),
                    "pitch": int(rng.integers(*PITCH))})
    return out


class EspeakVoice:
    """speak_corpus voice: espeak-ng per utterance (in threads), resampled to 16 kHz."""

    def __init__(self, cfg, speakers, inventory):
        self.exe = espeak_path()
        self.sample_rate = SAMPLE_RATE
        self.table = speaker_table(cfg.train_speakers, cfg.heldout_speakers, cfg.seed)
        self.phones_of = {rw.word: list(rw.phones) for rw in inventory}
        self.level_db, self.workers = cfg.acoustics.level_db, cfg.workers

    def _one(self, text: str, spk: dict) -> np.ndarray:
        import soundfile as sf
        import torch
        import torchaudio.functional as AF

        cmd = [self.exe, "-v", f"{spk['voice']}+{spk['variant']}", "-s", str(spk["rate"]), "-p", str(spk["pitch"]),
               "--stdout", text]
        done = subprocess.run(cmd, capture_output=True, timeout=60)
        if done.returncode != 0 or not done.stdout:
            raise RuntimeError(f"espeak-ng failed on {text!r}: {done.stderr.decode(errors='replace')[:200]}")
        wave, rate = sf.read(io.BytesIO(done.stdout), dtype="float32")
        return AF.resample(torch.from_numpy(wave), rate, SAMPLE_RATE).numpy()

    def render(self, sentences, speaker_ids, rng) -> list[np.ndarray]:
        texts = [espeak_text(s.words, s.spans, self.phones_of) for s in sentences]
        gains = rng.uniform(*self.level_db, len(sentences))
        with ThreadPoolExecutor(max(1, self.workers)) as pool:
            waves = list(pool.map(self._one, texts, [self.table[i] for i in speaker_ids]))
        out = []
        for w, g in zip(waves, gains):
            loud = np.abs(w) > 1e-3 * max(np.abs(w).max(), 1e-9)  # leave espeak-ng's silences out of the level
            w = w * 10 ** ((-23.0 + g) / 20) / (np.sqrt(np.mean(w[loud] ** 2)) + 1e-12)
            w *= min(1.0, 0.98 / max(np.abs(w).max(), 1e-12))
            out.append(np.round(w * 32767).astype(np.int16))
        return out
