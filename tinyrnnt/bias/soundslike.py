"""Sounds-like spellings: a biasing list entry written the way the recognizer spells its sound.

A name spelled in a convention the recognizer never learned ("szymiina") cannot
be spelled from sound, and a list that carries only that spelling cannot tell
the model how it sounds. When the list also knows the entry's pronunciation
(ARPAbet phones: from a lexicon, a pronunciation tool or a hint the user typed),
the entry is added in the spellings the recognizer itself would write for that
sound ("shimeena"). Decoding follows those spellings like any list word, and a
word decoded in one of them is written as the listed entry before scoring: the
written form is what the user asked for.

How the recognizer spells sounds is learned from its own training words
(`RespellingKey.learn`): each word's phones are aligned to letter groups of one
to three letters by expectation maximisation over all alignments, the
many-to-many alignment of Jiampojamarn, Kondrak & Sherif (NAACL 2007), here
with one phone to one group. A word-final phone gets its own groups where the
training words show enough of it ("penny": final IY as "y"). Phones the training
words never show fall back to a small respelling key (common English spellings,
as in dictionaries' pronunciation keys; written from memory), and every phone's
table also holds that key's spellings as PRIOR pseudo-counts (additive
smoothing towards it), so a phone the training words show once or twice is not
tied to their letters: the default corpus has ZH in one training word, and
without the prior its names' ZH could only be written "sh".

Spellings that are words of the recognizer's vocabulary are not added, so an
entry never takes over a common word.
"""

from __future__ import annotations

import heapq
import math
from collections import defaultdict
from typing import Iterable, Mapping

# Fallback key, ARPAbet (no stress) -> common English spellings, most usual first (from memory).
FALLBACK: dict[str, tuple[str, ...]] = {
    "AA": ("o", "a"), "AE": ("a",), "AH": ("a", "u"), "AO": ("aw", "o"), "AW": ("ow", "ou"),
    "AY": ("y", "i"), "EH": ("e",), "ER": ("er", "ur"), "EY": ("ay", "ai"), "IH": ("i", "y"),
    "IY": ("ee", "ea"), "OW": ("o", "oe"), "OY": ("oy",), "UH": ("oo",), "UW": ("oo", "u"),
    "B": ("b",), "CH": ("ch",), "D": ("d",), "DH": ("th",), "F": ("f", "ph"), "G": ("g",),
    "HH": ("h",), "JH": ("j",), "K": ("k", "c"), "L": ("l",), "M": ("m",), "N": ("n",),
    "NG": ("ng",), "P": ("p",), "R": ("r",), "S": ("s",), "SH": ("sh",), "T": ("t",),
    "TH": ("th",), "V": ("v",), "W": ("w",), "Y": ("y",), "Z": ("z",), "ZH": ("j", "zh"),
}
DEFAULT_LIMIT = 4
MAX_GROUP = 3  # letters one phone may be written with
KEEP = 0.1  # a spelling of a phone is used when at least this share of that phone's best one
MIN_FINAL = 20  # expected count a word-final phone needs to get groups of its own
FINAL = "$"  # marks a word-final phone in the learned table
PRIOR = 5.0  # pseudo-counts of the fallback key in every phone's learned table


def check_phones(phones: str | Iterable[str]) -> list[str]:
    """ARPAbet phones with stress digits left out; ValueError naming a phone that is not one.

    >>> check_phones("SH IH1 M")
    ['SH', 'IH', 'M']
    """
    seq = phones.split() if isinstance(phones, str) else list(phones)
    out = []
    for p in seq:
        base = p.rstrip("012")
        if base not in FALLBACK:
            raise ValueError(f"phone {p!r} of {' '.join(seq)!r} is not an ARPAbet phone; "
                             f"expected one of {sorted(FALLBACK)}")
        out.append(base)
    return out


class RespellingKey:
    """phone -> [(letters, probability), ...], most likely first; `respell` writes a pronunciation."""

    def __init__(self, table: Mapping[str, list[tuple[str, float]]]):
        self.table = {p: list(opts) for p, opts in table.items()}

    @classmethod
    def fallback(cls) -> "RespellingKey":
        return cls({p: [(s, 1.0 / (i + 1)) for i, s in enumerate(opts)] for p, opts in FALLBACK.items()})

    @classmethod
    def learn(cls, pairs: Iterable[tuple[str, Iterable[str]]], iterations: int = 8,
              prior: float = 0.0) -> "RespellingKey":
        """Learn from (spelling, phones) pairs by EM over one-phone-to-1..3-letters alignments.
        With `prior` > 0, each phone's table also holds the fallback key's spellings as that many
        pseudo-counts, so a phone the words show only once or twice is not tied to one spelling.

        >>> words = [("see", "S IY"), ("bee", "B IY"), ("sea", "S IY"), ("sit", "S IH T"), ("bit", "B IH T"),
        ...          ("tee", "T IY"), ("tip", "T IH P"), ("pit", "P IH T"), ("bib", "B IH B")]
        >>> key = RespellingKey.learn(words)
        >>> [s for s, _ in key.table["IY"]], key.table["S"][0][0]
        (['ee', 'ea'], 's')
        """
        data = []
        for word, phones in pairs:
            seq = check_phones(phones)
            if seq and len(seq) <= len(word) <= MAX_GROUP * len(seq):
                data.append((word, seq[:-1] + [seq[-1] + FINAL]))
        prob: dict[str, dict[str, float]] = defaultdict(lambda: defaultdict(lambda: 1.0))
        counts: dict[str, dict[str, float]] = {}
        for _ in range(iterations):
            counts = defaultdict(lambda: defaultdict(float))
            for word, seq in data:
                _expected_counts(word, seq, prob, counts)
            prob = defaultdict(lambda: defaultdict(float))
            for p, c in _merge_rare_finals(counts).items():
                total = sum(c.values())
                for s, n in c.items():
                    prob[p][s] = n / total
            for p in counts:  # a merged word-final phone reads its phone's table
                if p.endswith(FINAL) and p not in prob:
                    prob[p] = prob[p[:-1]]
        if prior > 0:
            for p, opts in FALLBACK.items():
                norm = sum(1.0 / (i + 1) for i in range(len(opts)))
                for i, spelling in enumerate(opts):
                    counts[p][spelling] += prior / (i + 1) / norm
        table = {}
        for p, c in _merge_rare_finals(counts).items():
            best = max(c.values())
            total = sum(c.values())
            table[p] = sorted(((s, n / total) for s, n in c.items() if n >= KEEP * best), key=lambda x: -x[1])
        return cls(table)

    def options(self, phone: str, final: bool) -> list[tuple[str, float]]:
        if final and phone + FINAL in self.table:
            return self.table[phone + FINAL]
        if phone in self.table:
            return self.table[phone]
        return RespellingKey.fallback().table[phone]

    def respell(self, phones: str | Iterable[str], limit: int = DEFAULT_LIMIT) -> list[str]:
        """Up to `limit` spellings of a pronunciation, most probable first (best-first search).

        >>> RespellingKey.fallback().respell("SH IH M IY N AH", limit=3)
        ['shimeena', 'shimeenu', 'shimeana']
        """
        seq = check_phones(phones)
        if not seq:
            return []
        opts = [self.options(p, i == len(seq) - 1) for i, p in enumerate(seq)]
        logp = [[-math.log(max(pr, 1e-12)) for _, pr in o] for o in opts]
        start = (sum(lp[0] for lp in logp), (0,) * len(seq))
        heap, seen, out = [start], {start[1]}, []
        while heap and len(out) < limit:
            cost, combo = heapq.heappop(heap)
            word = "".join(opts[i][k][0] for i, k in enumerate(combo))
            if word not in out:
                out.append(word)
            for i in range(len(seq)):
                if combo[i] + 1 < len(opts[i]):
                    nxt = combo[:i] + (combo[i] + 1,) + combo[i + 1:]
                    if nxt not in seen:
                        seen.add(nxt)
                        heapq.heappush(heap, (cost - logp[i][combo[i]] + logp[i][combo[i] + 1], nxt))
        return out


def _expected_counts(word: str, seq: list[str], prob, counts) -> None:
    """Add one word's expected phone -> letter-group counts (forward-backward over alignments)."""
    n, m = len(seq), len(word)
    fwd = [[0.0] * (m + 1) for _ in range(n + 1)]
    fwd[0][0] = 1.0
    for i in range(n):
        for j in range(m):
            if fwd[i][j]:
                for k in range(1, MAX_GROUP + 1):
                    if j + k <= m:
                        fwd[i + 1][j + k] += fwd[i][j] * prob[seq[i]][word[j:j + k]]
    total = fwd[n][m]
    if total <= 0:
        return
    bwd = [[0.0] * (m + 1) for _ in range(n + 1)]
    bwd[n][m] = 1.0
    for i in range(n - 1, -1, -1):
        for j in range(m - 1, -1, -1):
            for k in range(1, MAX_GROUP + 1):
                if j + k <= m and bwd[i + 1][j + k]:
                    bwd[i][j] += prob[seq[i]][word[j:j + k]] * bwd[i + 1][j + k]
    for i in range(n):
        for j in range(m):
            if fwd[i][j]:
                for k in range(1, MAX_GROUP + 1):
                    if j + k <= m and bwd[i + 1][j + k]:
                        s = word[j:j + k]
                        counts[seq[i]][s] += fwd[i][j] * prob[seq[i]][s] * bwd[i + 1][j + k] / total


def _merge_rare_finals(counts) -> dict:
    """Word-final phones with too little evidence of their own are counted with the phone."""
    out: dict[str, dict[str, float]] = defaultdict(lambda: defaultdict(float))
    for p, c in counts.items():
        if p.endswith(FINAL) and sum(c.values()) < MIN_FINAL:
            p = p[:-1]
        for s, n in c.items():
            out[p][s] += n
    return out


def expand_list(entries: list[str], phones_of: Mapping[str, str], vocabulary: set[str], key: RespellingKey,
                limit: int = DEFAULT_LIMIT, cache: dict | None = None) -> tuple[list[str], dict[str, str]]:
    """The list with each entry's sounds-like spellings added after all entries, and
    spelling -> the entry it stands for. Spellings that are an entry, another entry's spelling
    already (the first entry keeps a shared one), a vocabulary word or one edit from one are left out."""
    extra: dict[str, str] = {}
    taken = set(entries)
    cache = {} if cache is None else cache  # phones -> usable spellings; one cache per vocabulary and key
    for entry in entries:
        phones = phones_of.get(entry)
        if not phones:
            continue
        if (phones, limit) not in cache:
            cache[phones, limit] = [w for w in key.respell(phones, limit) if not near_word(w, vocabulary)]
        for spelling in cache[phones, limit]:
            if spelling not in taken and spelling not in extra:
                extra[spelling] = entry
    return list(entries) + list(extra), extra


LETTERS = "abcdefghijklmnopqrstuvwxyz'"


def near_word(spelling: str, vocabulary: set[str]) -> bool:
    """Is `spelling` a vocabulary word or one letter edit (insert, delete, substitute) from one?
    Such a spelling would let the entry take over a common word the model writes all the time.

    >>> near_word("klowd", {"cloud"}), near_word("clowd", {"cloud"}), near_word("shimeena", {"cloud"})
    (False, True, False)
    """
    if spelling in vocabulary:
        return True
    n = len(spelling)
    for i in range(n + 1):
        if i < n and spelling[:i] + spelling[i + 1:] in vocabulary:
            return True
        for c in LETTERS:
            if spelling[:i] + c + spelling[i:] in vocabulary:
                return True
            if i < n and c != spelling[i] and spelling[:i] + c + spelling[i + 1:] in vocabulary:
                return True
    return False


def put_back(hyp: str, written: Mapping[str, str]) -> str:
    """The hypothesis with every word that is a sounds-like spelling replaced by its entry.

    >>> put_back("call shimeena now", {"shimeena": "szymiina"})
    'call szymiina now'
    """
    if not written:
        return hyp
    return " ".join(written.get(w, w) for w in hyp.split())


_KEYS: dict[tuple[str, int], RespellingKey] = {}
_SPELLINGS: dict[tuple[str, int], dict] = {}


def _corpus_version(split) -> tuple[str, int]:
    train = split.folder / "train.jsonl"
    return (str(split.folder.resolve()), train.stat().st_mtime_ns if train.is_file() else 0)  # a rebuilt corpus learns anew


def corpus_spellings(split) -> dict:
    """The `cache` of expand_list for a corpus (its key and training vocabulary): phones -> usable
    spellings, kept for the process, so a boost sweep that decodes valid forty times spells each
    pronunciation once (near_word over 3,000 entries cost more than beam search itself)."""
    return _SPELLINGS.setdefault(_corpus_version(split), {})


def corpus_key(split) -> RespellingKey:
    """The respelling key learned from a corpus's training words:
    rare words with their inventory phones, other words with their first cmudict pronunciation
    (words with neither are left out); cached per corpus folder and version of its training text."""
    folder = _corpus_version(split)
    if folder not in _KEYS:
        from tinyrnnt.synth.lexicon import cmu, strip_stress

        phones_of, dictionary = split.pronunciations(), cmu()
        pairs = []
        for word in sorted(split.training_vocabulary()):
            if phones_of.get(word):
                pairs.append((word, phones_of[word]))
            elif dictionary.get(word):
                pairs.append((word, strip_stress(dictionary[word][0])))
        _KEYS[folder] = RespellingKey.learn(pairs, prior=PRIOR)
    return _KEYS[folder]
