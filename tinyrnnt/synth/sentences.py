"""The rare-word inventory and the sentence generator.

The inventory holds every rare word of the scenario with its class
(invented name, rare dictionary word, compound), its phones, its homophone
group (words sharing one phone string) and its *exposure*: how training text
uses it. Whole homophone groups share one exposure:

- ``frequent``: familiar entities, many times in training text;
- ``few_shot``: one to three times in training text;
- ``unseen_valid`` / ``unseen_test``: never in training text; the valid and
  the unseen test split use them;
- ``distractor``: never spoken; biasing lists draw on them;
- ``soundalike``: never spoken, but sounds like common words of the sound-alike
  test split (tinyrnnt.synth.soundalike), whose lists lead with them.

This module writes no files and renders no audio.
"""

from __future__ import annotations

from collections import defaultdict
from dataclasses import dataclass, field

import numpy as np

from tinyrnnt.config import ConfigError
from tinyrnnt.synth.lexicon import common_words, compounds, invented_names
from tinyrnnt.synth.scenario import FILLER_SLOT, Scenario

EXPOSURES = ("frequent", "few_shot", "unseen_valid", "unseen_test", "distractor", "soundalike")
SEEN = ("frequent", "few_shot")


@dataclass
class TextConfig:
    n_invented_names: int = 5500  # spellings; the distractor pool needs >= 5000
    n_compounds: int = 1500
    frequent_groups: int = 30  # homophone groups per class that training text uses often
    # Share of each class's groups seen once or twice in training: a long tail of words the model
    # cannot learn by heart, so a biasing input has something to teach (about 1/3 of entity uses).
    few_shot_share: float = 0.55
    unseen_valid_share: float = 0.08
    unseen_test_share: float = 0.2
    few_shot_count: tuple[int, int] = (1, 2)  # occurrences of each few-shot word in training text
    # Share of entity slots of the in-domain test (and seen half of valid) filled with few-shot
    # words, the rest with familiar ones. Kept at 0.15, below training's share, so the in-domain
    # test stays mostly about familiar words; few-shot words are scored per exposure anyway.
    test_few_shot_share: float = 0.15
    # Invented names in other name styles (tinyrnnt.synth.styles): style -> spellings, beside the
    # n_invented_names of the plain style. Seen extra styles appear in training only as few-shot
    # words (no familiar ones), so a biasing input learns to follow a list that disagrees with habit.
    extra_styles: dict = field(default_factory=lambda: {"fell": 1200, "reed": 500})
    # Styles held out of training text and training lists: all their names are unseen test names.
    heldout_styles: tuple[str, ...] = ("reed",)

    def __post_init__(self):
        from tinyrnnt.config import ConfigError, require

        require(self, "text", at_least_zero=("n_invented_names", "n_compounds", "frequent_groups"),
                fraction=("few_shot_share", "unseen_valid_share", "unseen_test_share", "test_few_shot_share"))
        lo, hi = self.few_shot_count
        if not 1 <= lo <= hi:
            raise ConfigError(f"text.few_shot_count must be [low, high] with 1 <= low <= high, got {list(self.few_shot_count)}")

    def check(self) -> None:
        """Checks across fields, once all settings are in."""
        if self.few_shot_share + self.unseen_valid_share + self.unseen_test_share > 1:
            raise ConfigError("text.few_shot_share + unseen_valid_share + unseen_test_share must not exceed 1")


@dataclass(frozen=True)
class RareWord:
    word: str
    cls: str
    slot: str
    phones: tuple[str, ...]
    group: int
    exposure: str
    style: str = ""  # name style of an invented name ("" for other classes and user words)


@dataclass
class Sentence:
    words: list[str]
    phones: list[str]  # ARPAbet, "pau" at phrase boundaries; no word boundaries by design
    spans: list[dict] = field(default_factory=list)  # rare words: index, word, class, exposure, style
    soundalikes: list[str] = field(default_factory=list)  # list entries that sound like its words

    @property
    def text(self) -> str:
        return " ".join(self.words)


def build_inventory(scn: Scenario, cfg: TextConfig, rng: np.random.Generator) -> list[RareWord]:
    """Every rare word of the scenario, grouped by sound, with its exposure.

    Exposures are cut per class and name style: the plain style and the other classes get
    familiar, few-shot, unseen and distractor groups; seen extra styles the same without
    familiar groups; held-out styles are unseen test words only.
    """
    from tinyrnnt.synth.styles import STYLES, style

    for name in list(cfg.extra_styles) + list(cfg.heldout_styles):
        style(name)  # unknown style names fail here, listing the known ones
    unknown = sorted(set(cfg.heldout_styles) - set(cfg.extra_styles) - {"plain"})
    if unknown:
        raise ConfigError(f"text.heldout_styles {unknown} are not among the corpus's styles "
                         f"(plain and text.extra_styles {sorted(cfg.extra_styles)})")
    # (class, style) -> groups of (phones, [(word, slot), ...])
    by_kind: dict[tuple[str, str], list[tuple[tuple[str, ...], list[tuple[str, str]]]]] = defaultdict(list)
    name_slots = [s for s, c in scn.entity_slots.items() if c == "invented_name" and s not in scn.user_entities]
    if name_slots:
        used: set[str] = set()
        taken: set[tuple[str, ...]] = set()
        for name, count in {"plain": cfg.n_invented_names, **cfg.extra_styles}.items():
            if not isinstance(count, int) or count < 0:
                raise ConfigError(f"text.extra_styles.{name}: expected a whole number of spellings >= 0, got {count!r}")
            if count == 0:
                continue
            slot_of = _proportional_slots(name_slots, scn)
            for i, g in enumerate(invented_names(count, rng, style=STYLES[name], used=used, taken=taken)):
                slot = name_slots[slot_of(i)]
                by_kind[("invented_name", name)].append((g.phones, [(s, slot) for s in g.spellings]))
    for slot, cls in scn.entity_slots.items():
        if slot in scn.user_entities:
            continue
        if cls == "rare_word":
            by_kind[(cls, "")].extend(((tuple(scn.lexicon.phones(w)), [(w, slot)]) for w in scn.rare_words))
        elif cls == "compound":
            for word, (a, b) in compounds(cfg.n_compounds, rng, scn.compound_parts):
                phones = tuple(scn.lexicon.phones(a) + scn.lexicon.phones(b))
                by_kind[(cls, "")].append((phones, [(word, slot)]))
    inventory: list[RareWord] = []
    group_id = 0
    for cls, sty in sorted(by_kind):
        groups = by_kind[(cls, sty)]
        order = rng.permutation(len(groups))
        n = len(groups)
        if sty in cfg.heldout_styles:
            cuts = np.array([0, 0, 0, n])  # every group an unseen test group
        else:
            familiar = min(cfg.frequent_groups, n // 4) if sty in ("", "plain") else 0
            cuts = np.cumsum([familiar, round(cfg.few_shot_share * n),
                              round(cfg.unseen_valid_share * n), round(cfg.unseen_test_share * n)])
        for rank, gi in enumerate(order):
            exposure = EXPOSURES[int(np.searchsorted(cuts, rank, side="right"))]
            phones, members = groups[gi]
            inventory.extend(RareWord(w, cls, slot, phones, group_id, exposure, sty) for w, slot in members)
            group_id += 1
    # A user's own words (entities_file) are dealt slot by slot, so that even a handful per slot
    # gives every split what it draws on.
    for slot in sorted(scn.user_entities):
        groups: dict[tuple[str, ...], list[str]] = defaultdict(list)
        for w in dict.fromkeys(scn.user_entities[slot]):
            groups[tuple(scn.lexicon.phones(w))].append(w)
        cuts = np.cumsum(user_role_sizes(len(groups), cfg, f"{scn.entities_file}: slot {{{slot}}}"))
        items = list(groups.items())
        for rank, gi in enumerate(rng.permutation(len(items))):
            phones, words = items[gi]
            exposure = EXPOSURES[int(np.searchsorted(cuts, rank, side="right"))]
            inventory.extend(RareWord(w, scn.entity_slots[slot], slot, phones, group_id, exposure) for w in words)
            group_id += 1
    return inventory


# What every slot must have for the splits to draw on: familiar words (training text fills the
# places its few-shot words leave), unseen words for the unseen half of valid and for test_unseen.
NEEDED = ("frequent", "unseen_valid", "unseen_test")
ROLE = {"frequent": "familiar", "few_shot": "few-shot", "unseen_valid": "unseen (valid)",
        "unseen_test": "unseen (test)", "distractor": "list-only", "soundalike": "sound-alike"}


def user_role_sizes(n: int, cfg: TextConfig, where: str) -> list[int]:
    """How many of a slot's n user word groups are dealt familiar, few-shot, unseen (valid), unseen
    (test); the rest are list-only. The shares of `cfg`, but at least one of each NEEDED role;
    fewer than len(NEEDED) groups is an error naming the slot.

    >>> user_role_sizes(4, TextConfig(), "demo"), user_role_sizes(12, TextConfig(), "demo")
    ([1, 1, 1, 1], [3, 6, 1, 2])
    """
    if n < len(NEEDED):
        raise ConfigError(f"{where}: {n} word(s) of distinct sound; a slot needs at least {len(NEEDED)} "
                          f"(one each {', '.join(ROLE[e] for e in NEEDED)}: training text, valid and test_unseen "
                          "draw on them); add words for this slot to the entities file")
    sizes = {"frequent": min(cfg.frequent_groups, n // 4), "few_shot": round(cfg.few_shot_share * n),
             "unseen_valid": round(cfg.unseen_valid_share * n), "unseen_test": round(cfg.unseen_test_share * n)}
    for e in NEEDED:
        sizes[e] = max(sizes[e], 1)
    while sum(sizes.values()) > n:  # give back from the largest share that can spare one
        spare = max(sizes, key=lambda e: sizes[e] - (e in NEEDED))
        sizes[spare] -= 1
    return list(sizes.values())


def _proportional_slots(slots: list[str], scn: Scenario):
    """Slot index for the i-th generated name group, in proportion to how many templates use each
    slot (a low-discrepancy sequence, so the shares hold in every prefix of the groups). Slots
    then get few-shot names in proportion to their open places in training text.

    >>> from types import SimpleNamespace as NS
    >>> scn = NS(templates=[NS(pieces=(("slot", "a"),)), NS(pieces=(("slot", "a"), ("slot", "b")))] * 2)
    >>> f = _proportional_slots(["a", "b"], scn)
    >>> [f(i) for i in range(6)], sum(f(i) == 0 for i in range(300))  # "a" is in 4 of 6 slot uses
    ([0, 0, 1, 0, 1, 0], 200)
    """
    uses = {s: 0 for s in slots}
    for t in scn.templates:
        for kind, val in t.pieces:
            if kind == "slot" and val in uses:
                uses[val] += 1
    w = np.array([max(uses[s], 1) for s in slots], dtype=np.float64)
    edges = np.cumsum(w / w.sum())
    golden = (5 ** 0.5 - 1) / 2
    return lambda i: min(int(np.searchsorted(edges, (i * golden + 0.5) % 1.0, side="right")), len(slots) - 1)


class SentenceMaker:
    """Fills templates; the caller says which exposures each split draws entities from."""

    def __init__(self, scn: Scenario, inventory: list[RareWord]):
        self.scn = scn
        self.pools: dict[tuple[str, str], list[RareWord]] = defaultdict(list)
        for rw in inventory:
            self.pools[(rw.slot, rw.exposure)].append(rw)
        fill = common_words(scn.filler_count)
        self.filler = [w for w, _ in fill]
        weights = np.array([f for _, f in fill]) ** scn.filler_weight_power
        self.filler_p = weights / weights.sum()
        self._phones: dict[str, list[str]] = {}

    def phones(self, word: str) -> list[str]:
        if word not in self._phones:
            self._phones[word] = self.scn.lexicon.phones(word)
        return self._phones[word]

    def skeletons(self, n: int, rng: np.random.Generator,
                  templates: list[int] | None = None) -> list[list[tuple[str, str]]]:
        """n sentences with common words filled in and entity slots left open (from the templates
        of the given indices, default all)."""
        out = []
        choice = list(range(len(self.scn.templates))) if templates is None else templates
        for k in rng.integers(len(choice), size=n):
            ti = choice[k]
            pieces: list[tuple[str, str]] = []
            for kind, val in self.scn.templates[ti].pieces:
                if kind == "slot" and val == FILLER_SLOT:
                    lo, hi = self.scn.filler_words
                    k = int(rng.integers(lo, hi + 1))
                    pieces += [("word", self.filler[i]) for i in rng.choice(len(self.filler), k, p=self.filler_p)]
                elif kind == "slot" and val in self.scn.phrases:
                    options = self.scn.phrases[val]
                    pieces += [("word", w) for w in options[rng.integers(len(options))]]
                else:
                    pieces.append((kind, val))
            out.append(pieces)
        return out

    def fill(self, skeletons: list[list[tuple[str, str]]], exposures: list[tuple[str, ...]],
             rng: np.random.Generator, few_shot_counts: tuple[int, int] | None = None,
             weights: dict[str, float] | None = None) -> list[Sentence]:
        """Fill entity slots. exposures[i] lists the exposures sentence i may draw from.

        A slot first picks one of those exposures (by `weights`, else uniformly), then a
        word of that exposure uniformly.

        With few_shot_counts, every few-shot word of the pools is placed that many
        times (drawn per word) at random open slots of its kind, the rest from the
        other exposures: exact counts, whatever the template mix.
        """
        open_slots: dict[str, list[tuple[int, int]]] = defaultdict(list)
        for i, sk in enumerate(skeletons):
            for j, (kind, val) in enumerate(sk):
                if kind == "slot":
                    open_slots[val].append((i, j))
        chosen: dict[tuple[int, int], RareWord] = {}
        if few_shot_counts is not None:
            for slot, places in open_slots.items():
                bag = [rw for rw in self.pools[(slot, "few_shot")]
                       for _ in range(int(rng.integers(few_shot_counts[0], few_shot_counts[1] + 1)))]
                if len(bag) > len(places) // 2:
                    raise ConfigError(f"slot {{{slot}}}: {len(bag)} few-shot uses need more sentences "
                                     f"than {len(places)} open slots allow; raise train_utts or lower text.few_shot_share")
                for k, p in zip(rng.choice(len(places), size=len(bag), replace=False), bag):
                    chosen[places[int(k)]] = p
        sentences = []
        for i, sk in enumerate(skeletons):
            words, phones, spans = [], [], []
            for j, (kind, val) in enumerate(sk):
                if kind == "pause":
                    if phones and phones[-1] != "pau":
                        phones.append("pau")
                    continue
                if kind == "word":
                    words.append(val)
                    phones += self.phones(val)
                    continue
                rw = chosen.get((i, j))
                if rw is None:
                    allowed = [e for e in exposures[i] if self.pools[(val, e)]
                               and (e != "few_shot" or few_shot_counts is None)]
                    if not allowed:
                        raise ConfigError(f"slot {{{val}}} has no words of exposure {exposures[i]}")
                    p = np.array([weights.get(e, 0.0) if weights else 1.0 for e in allowed])
                    e = allowed[int(rng.choice(len(allowed), p=p / p.sum()))] if len(allowed) > 1 else allowed[0]
                    pool = self.pools[(val, e)]
                    rw = pool[int(rng.integers(len(pool)))]
                spans.append({"index": len(words), "word": rw.word, "class": rw.cls, "exposure": rw.exposure,
                              "style": rw.style})
                words.append(rw.word)
                phones += rw.phones
            if phones and phones[-1] == "pau":
                phones.pop()
            sentences.append(Sentence(words, phones, spans))
        return sentences
