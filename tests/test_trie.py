"""Tests for the prefix tree and its next-token cue (tinyrnnt.bias.trie).

References: a brute-force linear scan of the list (the cue definition applied
word by word), and pyahocorasick for whole-word matching in running text.
"""

from __future__ import annotations

import ahocorasick
import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

from tinyrnnt.bias.trie import (BatchedTrees, PrefixTree, decode_cue, invented_words, time_build,
                                time_cue, training_cue)
from tinyrnnt.text import BLANK, SPACE, VOCAB_SIZE, TokenError, encode

torch.set_num_threads(1)

# A small alphabet so that words share prefixes often.
WORD = st.text(alphabet="abk'", min_size=1, max_size=5)
WORD_LIST = st.lists(WORD, max_size=6)
SETTINGS = ("first_tokens", "none")


def brute_cue(words: list[str], history: str, word_start: str) -> set[str]:
    """The cue definition by linear scan of the list (the reference)."""
    partial = history.split(" ")[-1]
    if partial == "" and word_start == "none":
        return set()
    out = {w[len(partial)] for w in words if w.startswith(partial) and len(w) > len(partial)}
    if partial in words:
        out.add(" ")
    return out


@st.composite
def utterances(draw, max_batch: int = 4):
    """(list of words, target text) pairs; targets mix list words and other words."""
    batch = []
    for _ in range(draw(st.integers(1, max_batch))):
        words = draw(WORD_LIST)
        pick = st.sampled_from(words) | WORD if words else WORD
        text = " ".join(draw(st.lists(pick, max_size=6)))
        batch.append((words, text))
    return batch


def pad_batch(texts: list[str], extra: int = 2, pad: int = 0):
    ids = [encode(t) if t else [] for t in texts]
    U = max(len(i) for i in ids) + extra
    targets = torch.full((len(ids), U), pad, dtype=torch.long)
    for b, row in enumerate(ids):
        targets[b, :len(row)] = torch.tensor(row, dtype=torch.long)
    return targets, torch.tensor([len(i) for i in ids])


def decode_time_cues(trees: BatchedTrees, texts: list[str], word_start: str, blanks_every: int = 0):
    """Cue rows from advance + cue, token by token (optionally with blanks in between)."""
    b = torch.arange(len(texts))
    ids = [encode(t) if t else [] for t in texts]
    node = trees.root(b)
    rows = [trees.cue(node, word_start)]
    for u in range(max(len(i) for i in ids)):
        tok = torch.tensor([i[u] if u < len(i) else SPACE for i in ids])
        if blanks_every and u % blanks_every == 0:
            node = trees.advance(node, torch.full_like(tok, BLANK), b)  # blank: state unchanged
        node = trees.advance(node, tok, b)
        rows.append(trees.cue(node, word_start))
    return torch.stack(rows, dim=1), node  # (B, max_len+1, V)


@settings(max_examples=80, deadline=None)
@given(utterances(), st.sampled_from(SETTINGS))
def test_cue_matches_linear_scan(batch, word_start):
    lists, texts = zip(*batch)
    targets, lengths = pad_batch(list(texts))
    cue = training_cue(targets, lengths, [PrefixTree(w) for w in lists], word_start)
    assert cue.shape == (len(texts), targets.shape[1] + 1, VOCAB_SIZE)
    assert cue[..., BLANK].sum() == 0
    for b, (words, text) in enumerate(batch):
        for u in range(len(text) + 1):
            assert set(decode_cue(cue[b, u])) == brute_cue(words, text[:u], word_start), (words, text, u)
        assert cue[b, len(text) + 1:].sum() == 0  # padding positions are zero


@settings(max_examples=60, deadline=None)
@given(WORD_LIST, st.lists(st.text(alphabet="abkx'", max_size=6), max_size=8))
def test_next_tokens_match_linear_scan(words, prefixes):
    tree = PrefixTree(words)
    for p in prefixes + [w[:k] for w in words for k in range(len(w) + 1)]:
        assert tree.next_tokens(p) == brute_cue(words, p, "first_tokens")
        assert (tree.lookup(p) >= 0) == (p == "" or any(w.startswith(p) for w in words))  # "" = root


@settings(max_examples=60, deadline=None)
@given(utterances(), st.sampled_from(SETTINGS), st.integers(0, 3))
def test_decode_time_state_equals_training_cue(batch, word_start, blanks_every):
    lists, texts = zip(*batch)
    trees = BatchedTrees([PrefixTree(w) for w in lists])
    targets, lengths = pad_batch(list(texts), extra=0)
    want = training_cue(targets, lengths, trees, word_start)
    got, _ = decode_time_cues(trees, list(texts), word_start, blanks_every)
    for b, text in enumerate(texts):
        assert torch.equal(got[b, :len(text) + 1], want[b, :len(text) + 1])


@settings(max_examples=60, deadline=None)
@given(utterances(max_batch=3))
def test_whole_words_agree_with_pyahocorasick(batch):
    lists, texts = zip(*batch)
    trees = BatchedTrees([PrefixTree(w) for w in lists])
    b = torch.arange(len(texts))
    for i, (words, text) in enumerate(batch):
        # Reference: pyahocorasick (Aho-Corasick automaton) finds every occurrence
        # of a list word; keep those delimited by spaces or the text's ends.
        expected = set()
        if words:
            auto = ahocorasick.Automaton()
            for w in set(words):
                auto.add_word(w, w)
            auto.make_automaton()
            for end, w in auto.iter(text):
                start = end - len(w) + 1
                if (start == 0 or text[start - 1] == " ") and (end + 1 == len(text) or text[end + 1] == " "):
                    expected.add(end + 1)
        # Ours: decode-time state sits on a terminal node right before a SPACE or the end.
        found, node = set(), trees.root(b[i:i + 1])
        for u, ch in enumerate(text, start=1):
            node = trees.advance(node, torch.tensor(encode(ch) if ch != " " else [SPACE]), b[i:i + 1])
            if (u == len(text) or text[u] == " ") and bool(trees.terminal[node]):
                found.add(u)
        assert found == expected


@pytest.mark.parametrize("word_start", SETTINGS)
def test_empty_list_gives_zero_cue(word_start):
    trees = [PrefixTree([]), PrefixTree([])]
    targets, lengths = pad_batch(["kell mara", "ferry"])
    assert training_cue(targets, lengths, trees, word_start).sum() == 0
    got, node = decode_time_cues(BatchedTrees(trees), ["kell mara", "ferry"], word_start)
    assert got.sum() == 0


def rows(words, text, word_start="first_tokens"):
    targets, lengths = pad_batch([text])
    cue = training_cue(targets, lengths, [PrefixTree(words)], word_start)
    return [decode_cue(r) for r in cue[0, :len(text) + 1]]


def test_word_longer_than_utterance():
    assert rows(["kelsowick"], "kel") == ["k", "e", "l", "s"]


def test_words_sharing_a_prefix():
    assert rows(["kell", "kelso"], "kelso kell") == ["k", "e", "l", "ls", "o", " ", "k", "e", "l", "ls", " "]


def test_one_token_word_and_dead_state():
    # "a" is a word: cue SPACE after it; "ab" is a prefix of nothing: dead until the next SPACE.
    assert rows(["a", "kell"], "ab a") == ["ak", " ", "", "ak", " "]
    assert rows(["a", "kell"], "ab a", "none") == ["", " ", "", "", " "]


def test_duplicates_collapse():
    one, two = PrefixTree(["kell", "mara"]), PrefixTree(["mara", "kell", "kell", "Mara"])
    assert one.n_words == two.n_words == 2 and one.n_nodes == two.n_nodes
    assert sorted(one.next_tokens("")) == sorted(two.next_tokens("")) == ["k", "m"]


def test_from_token_ids_equals_text_path():
    words = ["kell", "kelso", "mara", "o'dun"]
    a, b = PrefixTree(words), PrefixTree.from_token_ids([encode(w) for w in words])
    assert np.array_equal(a.child, b.child) and np.array_equal(a.node_cue, b.node_cue)
    assert np.array_equal(a.terminal, b.terminal)


def test_bad_entries_raise_clear_errors():
    with pytest.raises(TokenError, match=r"entry 1 \('mar7a'\).*'7'"):
        PrefixTree(["kell", "mar7a"])
    with pytest.raises(ValueError, match=r"entry 2 \('kell pier'\) is a phrase.*not supported"):
        PrefixTree(["kell", "mara", "kell pier"])
    with pytest.raises(ValueError, match=r"entry 0 .* is empty"):
        PrefixTree(["  "])
    with pytest.raises(TypeError, match="not one string"):
        PrefixTree("kell")
    with pytest.raises(ValueError, match=r"entry 1 .*SPACE"):
        PrefixTree.from_token_ids([[13], [13, SPACE, 3]])
    with pytest.raises(ValueError, match=r"entry 0 .*outside"):
        PrefixTree.from_token_ids([[BLANK, 3]])


def test_batch_of_one_equals_batched_and_padding_is_ignored():
    lists = [["kell", "kelso"], ["mara"], []]
    texts = ["kelso kell", "mara ma", "oske"]
    for pad in (0, SPACE, 99):
        targets, lengths = pad_batch(texts, pad=pad)
        batched = training_cue(targets, lengths, [PrefixTree(w) for w in lists])
        for b in range(3):
            alone = training_cue(targets[b:b + 1], lengths[b:b + 1], [PrefixTree(lists[b])])
            assert torch.equal(alone[0], batched[b])
            assert batched[b, lengths[b] + 1:].sum() == 0


def test_shared_tree_is_stored_once_and_gives_same_cue():
    tree = PrefixTree(["kell", "mara"])
    shared = BatchedTrees([tree, tree])
    copies = BatchedTrees([tree, PrefixTree(["kell", "mara"])])
    assert shared.child.shape[0] == tree.n_nodes + 1 and copies.child.shape[0] == 2 * tree.n_nodes + 1
    targets, lengths = pad_batch(["kell mara", "mar kel"])
    assert torch.equal(training_cue(targets, lengths, shared), training_cue(targets, lengths, copies))


def test_advance_rules():
    trees = BatchedTrees([PrefixTree(["kell"]), PrefixTree(["mara"])])
    b = torch.tensor([0, 1])
    k, m = encode("k")[0], encode("m")[0]
    node = trees.advance(trees.root(b), torch.tensor([k, k]), b)
    assert node[0] > 0 and node[1] == -1  # "k" is a prefix only in tree 0
    assert torch.equal(trees.advance(node, torch.tensor([BLANK, BLANK]), b), node)
    assert trees.advance(node, torch.tensor([m, m]), b)[1] == -1  # dead stays dead
    assert torch.equal(trees.advance(node, torch.tensor([SPACE, SPACE]), b), trees.root(b))
    assert trees.cue(torch.tensor([-1])).sum() == 0


def test_argument_errors():
    targets, lengths = pad_batch(["kell"])
    with pytest.raises(ValueError, match="word_start must be one of"):
        training_cue(targets, lengths, [PrefixTree(["kell"])], "start")
    with pytest.raises(ValueError, match="one tree per utterance"):
        training_cue(targets, lengths, [PrefixTree(["kell"])] * 2)
    with pytest.raises(ValueError, match="BLANK is never a label"):
        training_cue(torch.tensor([[13, BLANK, 7]]), torch.tensor([3]), [PrefixTree(["kell"])])


def test_benchmark_helpers_run():
    assert len(set(invented_words(20, np.random.default_rng(0)))) > 1
    assert time_cue(list_size=5, batch=2, U=12, repeats=2) > 0
    assert time_build(list_size=5, repeats=1) > 0


def test_normalize_folds_the_white_space_of_the_standard_library_regex():
    """normalize() folds runs of white space to one space and strips the ends, for every character
    Python's re module counts as white space (r"\\s" on str patterns; the standard library as the
    reference), and only for those: list entries and transcripts are split the same everywhere."""
    import re

    from tinyrnnt.text import normalize

    for code in range(0x3100):  # the Basic Latin to CJK-symbol blocks hold every white space character
        ch = chr(code)
        want = re.sub(r"\s+", " ", (" a" + ch + ch + "b ").strip().lower())
        assert normalize(" a" + ch + ch + "B ") == want, hex(code)
