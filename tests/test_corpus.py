"""The corpus: determinism, layout, no cue at word boundaries, careful writing, bad input."""

import hashlib
import json
from collections import defaultdict
from pathlib import Path

import numpy as np
import pytest

from tinyrnnt.synth.acoustics import Renderer, make_speakers
from tinyrnnt.synth.card import homophone_share
from tinyrnnt.synth.corpus import CorpusConfig, CorpusExistsError, build_corpus, make_text
from tinyrnnt.synth.scenario import ScenarioError, load_scenario
from tinyrnnt.synth.sentences import TextConfig

TINY = dict(test_soundalike_utts=20, train_utts=120, valid_utts=16, test_utts=16, test_unseen_utts=16, max_list_size=300,
            list_sizes=(0, 10, 100), train_speakers=6, heldout_speakers=2, workers=1,
            text=TextConfig(n_invented_names=600, n_compounds=200, few_shot_share=0.01,
                            extra_styles={"fell": 60, "reed": 40}))


def digest(folder: Path) -> str:
    h = hashlib.sha256()
    for p in sorted(folder.iterdir()):
        if p.name == "build.json":  # timing only
            continue
        h.update(p.name.encode() + hashlib.sha256(p.read_bytes()).digest())
    return h.hexdigest()


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    root = tmp_path_factory.mktemp("corpora")
    build_corpus(CorpusConfig(seed=3, **TINY), root / "a", quiet=True)
    return root


def test_same_seed_same_bytes_and_other_seed_differs(tiny):
    # sha256 of every file (Python's hashlib, FIPS 180-4).
    build_corpus(CorpusConfig(seed=3, **TINY), tiny / "b", quiet=True)
    build_corpus(CorpusConfig(seed=4, **TINY), tiny / "c", quiet=True)
    assert digest(tiny / "a") == digest(tiny / "b")
    assert digest(tiny / "a") != digest(tiny / "c")


def test_layout_manifest_and_lists(tiny):
    folder = tiny / "a"
    card = json.loads((folder / "card.json").read_text())
    assert card["splits"]["train"]["utterances"] == 120
    lines = [json.loads(x) for x in (folder / "test_unseen.jsonl").read_text().splitlines()]
    frames = np.load(folder / "test_unseen.feats.npy", mmap_mode="r")
    assert frames.dtype == np.uint8 and frames.shape[1] == 80
    assert sum(x["frames"] for x in lines) == frames.shape[0]
    assert all(sp["exposure"] == "unseen_test" for x in lines for sp in x["spans"])
    train_words = {sp["word"] for x in (folder / "train.jsonl").read_text().splitlines()
                   for sp in json.loads(x)["spans"]}
    assert not train_words & {sp["word"] for x in lines for sp in x["spans"]}  # never seen in training
    lists = np.load(folder / "test_unseen.lists.npy")
    inv = (folder / "inventory.tsv").read_text().splitlines()[1:]
    words = [row.split("\t")[1] for row in inv]
    for x, row in zip(lines, lists):
        own = {sp["word"] for sp in x["spans"]}
        assert not own & {words[i] for i in row}  # distractors are never the utterance's own words


def test_every_invented_name_shares_its_sound_and_classes_are_present():
    _, inventory, splits = make_text(CorpusConfig(seed=1, **TINY))
    assert homophone_share(inventory) == 1.0
    classes = {sp["class"] for s in splits["train"] for sp in s.spans}
    assert classes == {"invented_name", "rare_word", "compound"}
    # Proportions follow the config, per name style: frequent groups of the plain style, shares of
    # the rest; the seen extra style has no familiar names; the held-out style only unseen test names.
    groups = defaultdict(set)
    for rw in inventory:
        groups[(rw.style, rw.exposure)].add(rw.group)
    n_plain = len({rw.group for rw in inventory if rw.style == "plain"})
    assert len(groups[("plain", "frequent")]) == TINY["text"].frequent_groups
    assert abs(len(groups[("plain", "unseen_test")]) - 0.2 * n_plain) <= 1
    assert not groups[("fell", "frequent")] and groups[("fell", "unseen_test")]
    assert {e for (sty, e) in groups if sty == "reed"} == {"unseen_test"}
    reed = {rw.word for rw in inventory if rw.style == "reed"}
    assert reed & {sp["word"] for s in splits["test_unseen"] for sp in s.spans}
    assert not reed & {w for split in ("train", "valid", "test") for s in splits[split] for w in s.words}


def test_no_word_training_must_not_hear_occurs_in_training_text_over_several_seeds():
    """The build-time check holds for several corpus seeds (and the build would refuse otherwise)."""
    for seed in (0, 3, 11):
        _, inventory, splits = make_text(CorpusConfig(seed=seed, **TINY))
        never = {rw.word for rw in inventory if rw.exposure in ("unseen_valid", "unseen_test", "distractor", "soundalike")}
        assert never and not never & {w for s in splits["train"] for w in s.words}


def test_a_rare_word_that_templates_say_literally_is_left_out_with_a_warning(tmp_path):
    import warnings

    from tinyrnnt.resources import SCENARIO_DIR
    from tinyrnnt.synth.scenario import load_scenario

    text = (SCENARIO_DIR / "ferry_network.yaml").read_text()
    text = text.replace("rare_words: [bollard,", "rare_words: [crates, bollard,")
    (tmp_path / "s.yaml").write_text(text)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        scn = load_scenario(tmp_path / "s.yaml")
    assert "crates" not in scn.rare_words and "bollard" in scn.rare_words
    assert any("crates" in str(w.message) for w in caught)


def test_soundalike_split_has_no_rare_word_and_lists_led_by_soundalike_entries():
    _, inventory, splits = make_text(CorpusConfig(seed=1, **TINY))
    by_word = {rw.word: rw for rw in inventory}
    for s in splits["test_soundalike"]:
        assert not s.spans and s.soundalikes
        for entry in s.soundalikes:
            rw = by_word[entry]
            # the entry's sound is a stretch of the utterance's sound (a word, or two neighbours)
            assert " ".join(rw.phones) in " ".join(s.phones)


def test_word_boundaries_carry_no_cue():
    """Frames at word boundaries are not separable from word-internal phone boundaries.

    For phone pairs seen both across a word boundary and inside a word, the
    spectral change at the transition frame has one distribution: a two-sample
    Kolmogorov-Smirnov test (scipy.stats.ks_2samp) does not reject at 1 %.
    """
    from scipy.stats import ks_2samp

    cfg = CorpusConfig(seed=2, **{**TINY, "train_utts": 900})
    scn, inventory, splits = make_text(cfg)
    rare_phones = {rw.word: rw.phones for rw in inventory}
    sents = [s for s in splits["train"] if "pau" not in s.phones][:600]
    speakers = make_speakers(8, np.random.default_rng(0), cfg.acoustics)
    feats, starts = Renderer(cfg.acoustics, speakers).render([s.phones for s in sents],
                                                             [i % 8 for i in range(len(sents))],
                                                             np.random.default_rng(1))
    rare = {sp["word"] for s in sents for sp in s.spans}
    at_boundary, inside = defaultdict(list), defaultdict(list)
    for s, f, st in zip(sents, feats, starts):
        lengths = [len(rare_phones[w] if w in rare_phones else scn.lexicon.phones(w)) for w in s.words]
        edges = set(np.cumsum(lengths)[:-1].tolist())
        change = np.abs(np.diff(f, axis=0)).mean(axis=1)  # spectral change per frame step
        for j in range(1, len(s.phones)):
            frame = int(st[j])
            if 0 < frame < len(f):
                key = (s.phones[j - 1], s.phones[j])
                (at_boundary if j in edges else inside)[key].append(change[frame - 1])
    a, b = [], []
    for key in set(at_boundary) & set(inside):
        n = min(len(at_boundary[key]), len(inside[key]))
        a += at_boundary[key][:n]
        b += inside[key][:n]
    assert len(a) > 200 and rare
    assert ks_2samp(a, b).pvalue > 0.01


def test_existing_corpus_is_not_overwritten(tiny):
    before = digest(tiny / "a")
    with pytest.raises(CorpusExistsError):
        build_corpus(CorpusConfig(seed=9, **TINY), tiny / "a", quiet=True)
    assert digest(tiny / "a") == before


def test_failed_build_leaves_nothing_half_written(tmp_path):
    with pytest.raises(ValueError, match="max_list_size"):
        build_corpus(CorpusConfig(seed=1, **{**TINY, "max_list_size": 10 ** 6}), tmp_path / "x", quiet=True)
    assert list(tmp_path.iterdir()) == []


def _scenario(tmp_path, **changes):
    import yaml

    spec = yaml.safe_load(Path(load_scenario("ferry_network").path).read_text())
    spec.update(changes)
    p = tmp_path / "s.yaml"
    p.write_text(yaml.safe_dump(spec))
    return p


def test_bad_scenarios_name_file_and_line(tmp_path):
    (tmp_path / "t.txt").write_text("call {crew}\nroute the {vessel to {island}\n")
    with pytest.raises(ScenarioError, match=r"t.txt:2: .*unbalanced"):
        load_scenario(_scenario(tmp_path, templates_file="t.txt"))
    (tmp_path / "t2.txt").write_text("call {crew}\n\nsing to {captain}\n")
    with pytest.raises(ScenarioError, match=r"t2.txt:3: .*unknown slot \{captain\}"):
        load_scenario(_scenario(tmp_path, templates_file="t2.txt"))
    (tmp_path / "t3.txt").write_text("dock at pier 7\n")
    with pytest.raises(ScenarioError, match=r"t3.txt:1: .*character '7'"):
        load_scenario(_scenario(tmp_path, templates_file="t3.txt"))
    (tmp_path / "e.txt").write_text("# nobody yet\n")
    with pytest.raises(ScenarioError, match=r"e.txt: the entity file is empty"):
        load_scenario(_scenario(tmp_path, entities_file="e.txt"))
    (tmp_path / "lex.txt").write_text("maren M AA R EH N\noske OW S XX\n")
    with pytest.raises(Exception, match=r"lex.txt:2: .*'XX'"):
        load_scenario(_scenario(tmp_path, lexicon_file="lex.txt"))


def test_user_entities_and_lexicon(tmp_path):
    (tmp_path / "lex.txt").write_text("maren M AA R EH N\nmarren M AA R EH N\n")
    (tmp_path / "e.txt").write_text("crew maren\ncrew marren\n")
    scn = load_scenario(_scenario(tmp_path, lexicon_file="lex.txt", entities_file="e.txt"))
    assert scn.user_entities == {"crew": ["maren", "marren"]}
    assert scn.lexicon.phones("marren") == ["M", "AA", "R", "EH", "N"]


def test_overwrite_replaces_only_a_corpus_folder(tmp_path):
    from tinyrnnt.synth.corpus import CorpusExistsError

    folder = tmp_path / "mine"
    folder.mkdir()
    (folder / "notes.txt").write_text("a user's own file")
    with pytest.raises(CorpusExistsError, match="not a corpus"):
        build_corpus(CorpusConfig(seed=1, **TINY), folder, overwrite=True, quiet=True)
    assert (folder / "notes.txt").read_text() == "a user's own file"


def test_the_small_preset_and_the_section_form_of_settings():
    from tinyrnnt.synth.corpus import corpus_config

    cfg = corpus_config(["corpus.seed=4", "test_utts=50"], preset="small")
    assert (cfg.seed, cfg.test_utts, cfg.train_utts) == (4, 50, 1500)
    _, inventory, splits = make_text(cfg)  # its sizes fit: text for every split, lists possible
    assert len(splits["train"]) == 1500 and len(inventory) > cfg.max_list_size
