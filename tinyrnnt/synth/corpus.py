"""Build a synthetic corpus on disk: text, phones, frames, biasing lists, card.

Layout of a corpus folder (all ours):

    card.json                 counts, hours, rare-word rates, list statistics, feature scale
    build.json                how long the build took (the only file that differs between identical builds)
    config.yaml               the corpus settings it was built from (with seed)
    inventory.tsv             every rare word: index, word, class, slot, exposure, group, phones
    <split>.jsonl             one utterance per line: id, text, frames, offset, speaker, spans
    <split>.feats.npy         uint8 log-mel frames of the split, (total frames, mels); memory-mappable
    <split>.lists.npy         uint16 (utterances, max list size) distractor indices into inventory.tsv
    <split>.confusable.npy    the same, led by other spellings of the utterance's rare words

A biasing list of size N for an utterance is its rare words followed by the
first N - k distractors of its row (k = number of its distinct rare words), so
lists of different sizes are nested. By default distractors leave out the other
spellings of the utterance's own rare words (a list never offers "kal" beside a
spoken "cal"); `lists_skip_other_spellings: false` draws them like any word, and
the confusable lists lead with them as the stress test.

Splits: train, valid, test (familiar and few-shot names), test_unseen (names
never in training text, held-out name styles among them) and test_soundalike
(utterances with no rare word whose lists lead with entries that sound like
some of their words: tinyrnnt.synth.soundalike). Building checks that no unseen,
distractor or sound-alike word occurs anywhere in training text.

The whole folder is written under a temporary name and renamed into place; an
existing corpus is replaced only when asked.
"""

from __future__ import annotations

import json
import multiprocessing as mp
import os
import shutil
import sys
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from tinyrnnt.config import ConfigError
from tinyrnnt.data import quantize_frames
from tinyrnnt.files import check_output_folder, put_in_place
from tinyrnnt.synth.acoustics import AcousticConfig, Renderer, expected_frames, make_speakers
from tinyrnnt.synth.scenario import load_scenario
from tinyrnnt.synth.sentences import SEEN, RareWord, Sentence, SentenceMaker, TextConfig, build_inventory

SPLITS = ("train", "valid", "test", "test_unseen", "test_soundalike")
LIST_SPLITS = ("valid", "test", "test_unseen", "test_soundalike")
CONFUSABLE_SPLITS = ("valid", "test", "test_unseen")
# Entity exposures each split draws from; valid mixes seen and unseen-valid halves.
SPLIT_EXPOSURES = {"train": SEEN, "test": SEEN, "test_unseen": ("unseen_test",)}
CHUNK = 256  # utterances per rendering task; fixed so output does not depend on worker count


@dataclass
class CorpusConfig:
    scenario: str = "ferry_network"  # a built-in scenario name or a path to a scenario YAML
    seed: int = 0
    train_utts: int = 14000
    valid_utts: int = 400
    test_utts: int = 1000
    test_unseen_utts: int = 1000
    test_soundalike_utts: int = 400  # no rare word; lists lead with entries that sound like its words
    train_speakers: int = 200
    heldout_speakers: int = 40  # valid and test speakers, disjoint from training (common practice)
    max_list_size: int = 5000
    list_sizes: tuple[int, ...] = (0, 10, 100, 1000, 5000)  # sizes reports use; all <= max_list_size
    lists_skip_other_spellings: bool = True  # distractors never hold another spelling of a spoken rare word
    feature_offset: float = -14.0  # uint8 storage: value = offset + step * byte (offset = renderer floor)
    feature_step: float = 0.1  # natural-log units, about 0.43 dB
    workers: int = 2
    text: TextConfig = field(default_factory=TextConfig)
    acoustics: AcousticConfig = field(default_factory=AcousticConfig)

    def __post_init__(self):
        from tinyrnnt.config import ConfigError, require

        require(self, "corpus", positive=("train_utts", "valid_utts", "train_speakers", "heldout_speakers",
                                          "max_list_size", "workers", "feature_step"),
                at_least_zero=("test_utts", "test_unseen_utts", "test_soundalike_utts"))

    def check(self) -> None:
        """Checks across fields, once all settings are in (overrides come one at a time)."""
        bad = [n for n in self.list_sizes if not 0 <= n <= self.max_list_size]
        if bad:
            raise ConfigError(f"corpus.list_sizes {bad} must lie in 0..max_list_size ({self.max_list_size})")
        self.text.check()


# Named sets of corpus settings (`tinyrnnt corpus --preset NAME`), written as overrides.
PRESETS: dict[str, list[str]] = {
    # a corpus to try things out with: built in seconds, too small for figures worth quoting
    "small": ["train_utts=1500", "valid_utts=100", "test_utts=200", "test_unseen_utts=200",
              "test_soundalike_utts=60", "train_speakers=40", "heldout_speakers=10", "max_list_size=1000",
              "list_sizes=[0, 10, 100, 1000]", "text.n_invented_names=1500", "text.n_compounds=400",
              "text.few_shot_share=0.2", "text.extra_styles={fell: 200, reed: 150}"],
}


def corpus_config(settings=(), preset: str | None = None) -> CorpusConfig:
    """Corpus settings from a preset and `key=value` overrides; `corpus.key=value` (the section form
    `train` and `experiment` take) means the same."""
    from tinyrnnt import config as C

    if preset is not None and preset not in PRESETS:
        raise ConfigError(f"unknown corpus preset {preset!r}; presets: {sorted(PRESETS)}")
    items = (PRESETS[preset] if preset else []) + [s[len("corpus."):] if s.startswith("corpus.") else s
                                                   for s in settings]
    return C.apply_overrides(CorpusConfig(), items)


class CorpusExistsError(FileExistsError):
    pass


def _render_chunk(args):
    phones, speaker_ids, seed = args
    feats, _ = _RENDERER.render(phones, speaker_ids, np.random.default_rng(seed))
    return feats


def _init_worker(acoustics: AcousticConfig, speakers):
    global _RENDERER
    _RENDERER = Renderer(acoustics, speakers)


def _progress(msg: str, quiet: bool) -> None:
    if not quiet:
        print(msg, file=sys.stderr, flush=True)


def make_text(cfg: CorpusConfig):
    """Scenario, inventory and the sentences of every split (deterministic in cfg.seed)."""
    from tinyrnnt.synth.soundalike import SoundAlikes

    cfg.check()

    scn = load_scenario(cfg.scenario)
    seeds = np.random.SeedSequence(cfg.seed).spawn(9)
    inventory = build_inventory(scn, cfg.text, np.random.default_rng(seeds[0]))
    maker = SentenceMaker(scn, inventory)
    sizes = {"train": cfg.train_utts, "valid": cfg.valid_utts, "test": cfg.test_utts,
             "test_unseen": cfg.test_unseen_utts}
    splits: dict[str, list[Sentence]] = {}
    for k, split in enumerate(SPLITS[:4]):
        rng = np.random.default_rng(seeds[1 + k])
        n = sizes[split]
        sk = maker.skeletons(n, rng)
        if split == "valid":
            exposures = [SEEN if i % 2 == 0 else ("unseen_valid",) for i in range(n)]
        else:
            exposures = [SPLIT_EXPOSURES[split]] * n
        share = cfg.text.test_few_shot_share
        splits[split] = maker.fill(sk, exposures, rng,
                                   few_shot_counts=cfg.text.few_shot_count if split == "train" else None,
                                   weights={"frequent": 1.0 - share, "few_shot": share})
    rng = np.random.default_rng(seeds[8])
    sounds = SoundAlikes(scn.lexicon, scn.compound_parts, rng)
    splits["test_soundalike"] = soundalike_sentences(maker, sounds, inventory, cfg.test_soundalike_utts, rng)
    check_training_text(splits["train"], inventory)
    return scn, inventory, splits


def soundalike_sentences(maker: SentenceMaker, sounds, inventory: list[RareWord], n: int,
                         rng: np.random.Generator) -> list[Sentence]:
    """n sentences of templates without rare-word slots that have sound-alike entries; new entries
    join the inventory (exposure "soundalike"), entries it already holds keep their own."""
    if n == 0:
        return []
    plain = [i for i, t in enumerate(maker.scn.templates)
             if not any(kind == "slot" and val in maker.scn.entity_slots for kind, val in t.pieces)]
    if not plain:
        raise ConfigError(f"scenario {maker.scn.name}: test_soundalike_utts = {n} needs templates without "
                         "rare-word slots; set corpus test_soundalike_utts=0 or add such templates")
    known = {rw.word: rw for rw in inventory}
    group = max((rw.group for rw in inventory), default=-1) + 1
    out: list[Sentence] = []
    for _ in range(50):
        for s in maker.fill(maker.skeletons(n, rng, templates=plain), [()] * n, rng):
            entries = sounds.entries(s.words)
            if not entries:
                continue
            for word, cls, phones in entries:
                if word not in known:
                    known[word] = RareWord(word, cls, "", phones, group, "soundalike")
                    inventory.append(known[word])
                    group += 1
            s.soundalikes = [w for w, _, _ in entries]
            out.append(s)
            if len(out) == n:
                return out
    raise ConfigError(f"only {len(out)} of {n} sentences without rare words have sound-alike entries; "
                     "lower test_soundalike_utts")


def check_training_text(train: list[Sentence], inventory: list[RareWord]) -> None:
    """No word training must never hear (unseen, distractor, sound-alike) occurs in training text."""
    never = {rw.word: rw.exposure for rw in inventory if rw.exposure not in SEEN}
    leaks = sorted({w for s in train for w in s.words if w in never})
    if leaks:
        raise ConfigError(f"training text holds {len(leaks)} words it must never hear, e.g. "
                         + ", ".join(f"{w!r} ({never[w]})" for w in leaks[:5])
                         + "; a scenario word may coincide with a generated rare word")


def _lists(sentences: list[Sentence], inventory: list[RareWord], index: dict[str, int],
           max_size: int, rng: np.random.Generator, lead: str, skip_other_spellings: bool) -> np.ndarray:
    """(utterances, max_size) distractor indices, never a word of the utterance.

    lead: "" (random distractors only), "siblings" (the other spellings of the utterance's rare
    words first), "soundalikes" (its sound-alike entries first).
    """
    groups: dict[int, list[int]] = {}
    for i, rw in enumerate(inventory):
        groups.setdefault(rw.group, []).append(i)
    n_inv = len(inventory)
    if max_size > n_inv - 8:
        raise ConfigError(f"max_list_size {max_size} needs an inventory larger than {n_inv} words")
    out = np.empty((len(sentences), max_size), dtype=np.uint16)
    for u, s in enumerate(sentences):
        own = {index[sp["word"]] for sp in s.spans}
        siblings = [j for i in own for j in groups[inventory[i].group] if j not in own]
        first = {"": [], "siblings": siblings, "soundalikes": [index[w] for w in s.soundalikes]}[lead]
        banned = own | set(first) | (set(siblings) if skip_other_spellings else set())
        lead_ids = list(rng.permutation(first)) if first else []
        perm = rng.permutation(n_inv)
        rest = perm[~np.isin(perm, list(banned))] if banned else perm
        out[u] = np.concatenate([np.asarray(lead_ids, dtype=np.int64), rest])[:max_size]
    return out


def expected_bytes(cfg: CorpusConfig, splits: dict[str, list[Sentence]]) -> int:
    """About how many bytes the corpus folder will take: uint8 frames (their expected number, from
    the duration model), uint16 list rows, manifest lines (their text and spans exactly)."""
    frames = sum(expected_frames([s.phones for s in sents], cfg.acoustics) for sents in splits.values())
    rows = sum(len(splits[split]) * (2 if split in CONFUSABLE_SPLITS else 1) for split in LIST_SPLITS)
    manifests = sum(len(json.dumps({"text": s.text, "spans": s.spans})) + 100 for ss in splits.values() for s in ss)
    return int(frames * cfg.acoustics.n_mels + rows * cfg.max_list_size * 2 + manifests)


def _write_json(path: Path, obj) -> None:
    path.write_text(json.dumps(obj, indent=1) + "\n", encoding="utf-8")


def build_corpus(cfg: CorpusConfig, out_dir: str | Path, overwrite: bool = False, quiet: bool = False) -> dict:
    """Synthesize the corpus into out_dir; returns its card."""
    import yaml

    out_dir = Path(out_dir)
    if out_dir.exists() and not overwrite:
        raise CorpusExistsError(f"{out_dir} already exists; pass overwrite to replace it")
    if out_dir.exists() and not out_dir.is_dir():
        raise CorpusExistsError(f"{out_dir} is a file, not a corpus folder; refusing to replace it")
    if out_dir.exists() and not (out_dir / "card.json").is_file() and any(out_dir.iterdir()):
        raise CorpusExistsError(f"{out_dir} holds files but no corpus card (card.json): it is not a corpus, "
                                "so it is not replaced; pick another folder or empty it first")
    check_output_folder(out_dir, 0, "corpus folder")
    t0 = time.perf_counter()
    scn, inventory, splits = make_text(cfg)
    if cfg.max_list_size > len(inventory) - 8:  # checked before anything is rendered
        invents = any(c == "invented_name" and s not in scn.user_entities for s, c in scn.entity_slots.items())
        more = "raise text.n_invented_names" if invents else "add words to the scenario's entities file"
        raise ConfigError(f"max_list_size {cfg.max_list_size} needs more than {cfg.max_list_size + 8} rare words "
                         f"in the inventory, scenario {scn.name} gives {len(inventory)}; lower max_list_size "
                         f"(and list_sizes to match) or {more}")
    check_output_folder(out_dir, expected_bytes(cfg, splits), "corpus folder")  # room for it all, before rendering
    _progress(f"text: {sum(len(v) for v in splits.values())} sentences, {len(inventory)} rare words "
              f"({time.perf_counter() - t0:.1f} s)", quiet)
    seeds = np.random.SeedSequence(cfg.seed).spawn(9)
    spk_rng = np.random.default_rng(seeds[5])
    speakers = make_speakers(cfg.train_speakers + cfg.heldout_speakers, spk_rng, cfg.acoustics)
    index = {rw.word: i for i, rw in enumerate(inventory)}

    out_dir.parent.mkdir(parents=True, exist_ok=True)
    tmp = out_dir.parent / f".{out_dir.name}.partial-{os.getpid()}"
    if tmp.exists():
        shutil.rmtree(tmp)
    tmp.mkdir()
    try:
        stats = _write_splits(cfg, tmp, splits, speakers, spk_rng, t0, quiet)
        list_rng = np.random.default_rng(seeds[6])
        list_stats = {}
        for split in LIST_SPLITS:
            kinds = [("soundalikes" if split == "test_soundalike" else "", "lists")]
            kinds += [("siblings", "confusable")] if split in CONFUSABLE_SPLITS else []
            for lead, suffix in kinds:
                arr = _lists(splits[split], inventory, index, cfg.max_list_size, list_rng, lead,
                             cfg.lists_skip_other_spellings)
                np.save(tmp / f"{split}.{suffix}.npy", arr)
            list_stats[split] = {"utterances_with_rare_words": sum(bool(s.spans) for s in splits[split])}
        with open(tmp / "inventory.tsv", "w", encoding="utf-8") as f:
            f.write("index\tword\tclass\tslot\texposure\tgroup\tstyle\tphones\n")
            for i, rw in enumerate(inventory):
                f.write(f"{i}\t{rw.word}\t{rw.cls}\t{rw.slot}\t{rw.exposure}\t{rw.group}\t{rw.style}\t"
                        f"{' '.join(rw.phones)}\n")
        (tmp / "config.yaml").write_text(yaml.safe_dump(_plain(asdict(cfg)), sort_keys=False), encoding="utf-8")
        from tinyrnnt.synth.card import make_card

        card = make_card(cfg, scn, inventory, splits, stats, list_stats, tmp)
        _write_json(tmp / "card.json", card)
        # Timing is the one thing that differs between identical builds: kept out of the card.
        _write_json(tmp / "build.json", {"build_seconds": round(time.perf_counter() - t0, 2)})
        put_in_place(tmp, out_dir)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    card["build_seconds"] = round(time.perf_counter() - t0, 2)
    return card


def _plain(obj):
    if isinstance(obj, dict):
        return {k: _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    return obj


def _write_splits(cfg, tmp: Path, splits, speakers, spk_rng, t0, quiet) -> dict:
    """Render every split (in parallel chunks), quantise to uint8, write manifest and shards."""
    seeds = np.random.SeedSequence([cfg.seed, 1]).spawn(len(SPLITS))
    ctx = mp.get_context("fork")
    stats = {}
    pool = ctx.Pool(cfg.workers, _init_worker, (cfg.acoustics, speakers)) if cfg.workers > 1 else None
    if pool is None:
        _init_worker(cfg.acoustics, speakers)
    try:
        for k, split in enumerate(SPLITS):
            sents = splits[split]
            n = len(sents)
            lo, hi = (0, cfg.train_speakers) if split == "train" else \
                (cfg.train_speakers, cfg.train_speakers + cfg.heldout_speakers)
            spk = spk_rng.integers(lo, hi, size=n)
            chunk_seeds = seeds[k].spawn((n + CHUNK - 1) // CHUNK)
            tasks = [([s.phones for s in sents[i:i + CHUNK]], spk[i:i + CHUNK].tolist(), chunk_seeds[i // CHUNK])
                     for i in range(0, n, CHUNK)]
            results = pool.imap(_render_chunk, tasks) if pool else map(_render_chunk, tasks)
            shard, lengths = [], []
            total = np.zeros(cfg.acoustics.n_mels)
            total_sq = np.zeros(cfg.acoustics.n_mels)
            clipped = 0
            for feats in results:
                for f in feats:
                    q, n_clipped, deq = quantize_frames(f, cfg.feature_offset, cfg.feature_step)
                    clipped += n_clipped
                    total += deq.sum(0)
                    total_sq += (deq ** 2).sum(0)
                    shard.append(q)
                    lengths.append(len(q))
                _progress(f"{split}: {len(lengths)}/{n} utterances ({time.perf_counter() - t0:.1f} s)", quiet)
            frames = np.concatenate(shard) if shard else np.zeros((0, cfg.acoustics.n_mels), np.uint8)
            np.save(tmp / f"{split}.feats.npy", frames)
            offsets = np.concatenate([[0], np.cumsum(lengths)[:-1]]).astype(int) if lengths else []
            with open(tmp / f"{split}.jsonl", "w", encoding="utf-8") as f:
                for i, s in enumerate(sents):
                    f.write(json.dumps({"id": f"{split}-{i:06d}", "text": s.text, "frames": int(lengths[i]),
                                        "offset": int(offsets[i]), "speaker": f"spk{int(spk[i]):03d}",
                                        "spans": s.spans}) + "\n")
            count = max(int(frames.shape[0]), 1)
            mean = total / count
            stats[split] = {"utterances": n, "frames": int(frames.shape[0]), "clipped_values": clipped,
                            "mean": mean, "std": np.sqrt(np.maximum(total_sq / count - mean ** 2, 1e-8))}
    finally:
        if pool is not None:
            pool.close()
            pool.join()
    return stats
