"""Shallow-fusion boosting (tinyrnnt.bias.fusion) and its settings.

Matches are checked against pyahocorasick (a registry library implementing Aho & Corasick,
CACM 1975) on random texts and lists; the bonus follows the subtractive failure cost of
Zhao et al., Interspeech 2019 (a worked example below, values computed by hand).
"""

import json
import random

import ahocorasick
import pytest

from tinyrnnt import config as C
from tinyrnnt.bias.fusion import BoostAutomaton, Booster, parse_triggers, sequence_bonus
from tinyrnnt.config import ConfigError
from tinyrnnt.experiment import ExperimentConfig


def test_matches_agree_with_pyahocorasick_on_random_texts():
    rng = random.Random(0)
    for _ in range(400):
        words = ["".join(rng.choice("abc") for _ in range(rng.randint(1, 3))) for _ in range(rng.randint(1, 6))]
        words.append(" ".join(rng.sample(words, min(2, len(words)))))  # a two-word entry
        words = list(dict.fromkeys(words))
        text = " ".join(rng.choice(words + ["ab", "c", "ba"]) for _ in range(rng.randint(1, 8)))
        reference = ahocorasick.Automaton()
        for w in words:  # word boundaries: the same padding on both sides
            reference.add_word(f" {w} ", w)
        reference.make_automaton()
        assert sorted(BoostAutomaton(words).matches(text)) == sorted(reference.iter(f" {text} "))


def test_bonus_per_token_taken_back_on_failure_kept_when_complete():
    # worked example, by hand: w = 1.5 per matched token
    w = 1.5
    assert sequence_bonus(["kell"], "call kell now", w) == pytest.approx(4 * w)  # k e l l kept
    assert sequence_bonus(["kell"], "call kelp now", w) == pytest.approx(0.0)  # k e l earned, then taken back
    assert sequence_bonus(["kell"], "call kel", w) == pytest.approx(0.0)  # open at the end: taken back
    assert sequence_bonus(["kell"], "call skell", w) == pytest.approx(0.0)  # not at a word start
    assert sequence_bonus(["kell"], "call kells", w) == pytest.approx(0.0)  # not at a word end
    assert sequence_bonus(["kell", "mara"], "kell and mara", w) == pytest.approx(8 * w)
    # a two-word entry counts its inner space; its first word, listed too, is not counted twice
    assert sequence_bonus(["kell harbour"], "to kell harbour", w) == pytest.approx(12 * w)
    assert sequence_bonus(["kell", "kell harbour"], "to kell harbour", w) == pytest.approx(12 * w)
    assert sequence_bonus(["kell harbour"], "to kell pier", w) == pytest.approx(0.0)


def test_step_deltas_add_up_to_the_sequence_bonus():
    # the per-token score changes beam search adds are the differences of the running bonus
    import torch

    from tinyrnnt.text import encode

    b = Booster([["kell", "kelso", "mara"]], 2.0)
    st, running = b.start(), []
    for tok in encode("kelso and kelp"):
        running.append(float(b.deltas(st)[0, tok]))
        st = b.advance(st, torch.tensor([tok]))
    assert running[:5] == [2.0] * 5  # k e l s o
    assert running[5] == 0.0  # the space completes "kelso": kept
    assert sum(running) + float(b.final(st)[0]) == pytest.approx(10.0)  # "kelp" earned 6, taken back


def test_after_trigger_only_boosts_after_a_phrase_of_the_class():
    trig = {"crew": ["call", "send a message to"], "island": ["to"]}
    cls = ["crew", "island"]
    words = ["kell", "marra"]
    assert sequence_bonus(words, "call kell", 1.0, "after_trigger", cls, trig) == pytest.approx(4)
    assert sequence_bonus(words, "send a message to kell", 1.0, "after_trigger", cls, trig) == pytest.approx(4)
    assert sequence_bonus(words, "ask kell", 1.0, "after_trigger", cls, trig) == 0.0  # no trigger
    assert sequence_bonus(words, "call marra", 1.0, "after_trigger", cls, trig) == 0.0  # another class's trigger
    assert sequence_bonus(words, "go to marra", 1.0, "after_trigger", cls, trig) == pytest.approx(5)
    assert sequence_bonus(words, "call the kell", 1.0, "after_trigger", cls, trig) == 0.0  # not right after
    assert sequence_bonus(words, "kell", 1.0, "anywhere") == pytest.approx(4)


@pytest.mark.parametrize("setting, message", [
    ("decode.boost_weight=.inf", "finite number"),
    ("decode.triggers={crew: 'call | | ring'}", "trigger phrase 2 of 'call | | ring' is empty"),
    ("decode.triggers={crew: 'call 9'}", "outside the token inventory"),
    ("decode.boost_where=after_trigger", "needs decode.triggers"),
    ("decode.boost_where=nearby", "must be one of"),
    ("decode.model_boost_scale=-1", "must be >= 0"),
    ("decode.model_boost_scale=.inf", "finite number"),
])
def test_bad_boost_settings_are_clear_errors(setting, message):
    with pytest.raises(ConfigError, match=message):
        C.apply_overrides(ExperimentConfig(), ["decode.search=beam", "decode.boost_weight=1", setting]).decode.boost()


def test_boost_needs_beam_search_and_list_words_in_the_inventory():
    with pytest.raises(ConfigError, match="needs decode.search=beam"):
        C.apply_overrides(ExperimentConfig(), ["decode.boost_weight=1"])
    with pytest.raises(ConfigError, match="model_boost_scale balances.*needs decode.boost_weight"):
        C.apply_overrides(ExperimentConfig(), ["decode.model_boost_scale=0.5"])
    boost = C.apply_overrides(ExperimentConfig(), ["decode.search=beam", "decode.boost_weight=1",
                                                   "decode.model_boost_scale=0.25"]).decode.boost()
    assert boost["model_scale"] == 0.25
    with pytest.raises(ConfigError, match=r"entry 2 \('ma7a'\).*'7'"):
        Booster([["kell", "ma7a"]], 1.0)
    with pytest.raises(ConfigError, match="empty"):
        parse_triggers({"crew": ""})


def test_list_file_sections_and_triggers(tmp_path):
    from tinyrnnt.data import CorpusError
    from tinyrnnt.lab.evaluate import read_list_sections

    f = tmp_path / "mine.txt"
    f.write_text("# crew and islands\nolwen\n[crew] after: call | ring up\nMaren  Oske\njory\n[island]\nskellig\n")
    entries, classes, triggers = read_list_sections(f)
    assert entries == ["olwen", "maren oske", "jory", "skellig"]
    assert classes == [None, "crew", "crew", "island"]
    assert triggers == {"crew": "call | ring up"}
    json.dumps(triggers)
    f.write_text("[crew after: call\nkell\n")
    with pytest.raises(CorpusError, match=r"mine.txt:1: expected a class line"):
        read_list_sections(f)
    f.write_text("[crew] after: call ||\nkell\n")
    with pytest.raises(CorpusError, match=r"mine.txt:1.*empty"):
        read_list_sections(f)


@pytest.mark.parametrize("variant, message", [
    ({"search": "beam", "width": 4}, "unknown key 'width'"),
    ({"boost_weight": "tuned"}, "needs decode.search=beam"),
    ({"search": "beam", "boost_weight": 1, "boost_where": "after_trigger"}, "needs decode.triggers"),
    ("beam", "must be a mapping"),
])
def test_bad_decoding_variants_in_a_recipe_fail_before_training(variant, message):
    from tinyrnnt.lab.recipes import EvalPlan

    with pytest.raises(ConfigError, match=f"evaluate.decoding.v.*{message}"):
        EvalPlan(decoding={"v": variant})


def test_the_built_in_fusion_recipe_reads():
    from tinyrnnt.lab.recipes import read_recipe

    plan = read_recipe("trie_fusion").evaluate
    assert list(plan.variants()) == ["greedy", "beam", "beam_fusion", "beam_fusion_after_trigger"]
