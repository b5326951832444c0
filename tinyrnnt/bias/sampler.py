"""Training-time biasing lists, in the spirit of CLAS (Pundak et al., 2018).

Per training utterance: with `empty_list` the list is empty; otherwise each
reference rare word is kept with `keep_true` (so the model also meets lists
that lack the true word and learns to trust the sound), a kept word brings its
other spellings with `confusable`, and distractors are drawn from the words
training may know of (exposures frequent, few_shot, distractor; never the
unseen valid/test words), list size uniform in `size`. Seeded; with the
data loader in the main process the lists follow the batch order exactly.
"""

from __future__ import annotations

import numpy as np

TRAINING_EXPOSURES = ("frequent", "few_shot", "distractor")


class TrainingLists:
    def __init__(self, inventory: list[dict], sampling, seed: int = 0):
        self.cfg = sampling
        self.rng = np.random.default_rng([seed, 77])
        self.words = [row["word"] for row in inventory]
        self.pool = np.array([i for i, row in enumerate(inventory) if row["exposure"] in TRAINING_EXPOSURES])
        self.group_of = {row["word"]: row["group"] for row in inventory}
        self.members: dict[str, list[str]] = {}
        for row in inventory:
            self.members.setdefault(row["group"], []).append(row["word"])

    def __call__(self, item: dict) -> dict:
        item["list"] = self.sample([sp["word"] for sp in item["spans"]])
        return item

    def sample(self, reference_words: list[str]) -> list[str]:
        c, rng = self.cfg, self.rng
        if rng.random() < c.empty_list:
            return []
        own = set(reference_words)
        kept = [w for w in dict.fromkeys(reference_words) if rng.random() < c.keep_true]
        siblings = [s for w in kept if rng.random() < c.confusable
                    for s in self.members[self.group_of[w]] if s not in own]
        n = int(rng.integers(c.size[0], c.size[1] + 1))
        banned = own | {s for w in own for s in self.members[self.group_of[w]]}
        picks = [self.words[i] for i in self.pool[rng.integers(len(self.pool), size=n + 4)]]
        distractors = [w for w in dict.fromkeys(picks) if w not in banned][:n]
        out = kept + siblings + distractors
        return [out[i] for i in rng.permutation(len(out))]
