"""Tests for tinyrnnt.score against jiwer, scipy, brute force and worked examples."""

from __future__ import annotations

import math

import jiwer
import numpy as np
import pytest
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st

from tinyrnnt.score import (
    align,
    cer,
    compare_systems,
    covering_entries,
    edit_counts,
    paired_bootstrap,
    score_utterance,
    summarize,
    wer,
)

# A tiny vocabulary so that random pairs share words and errors of every kind happen.
TINY = ["a", "b", "ab", "ba"]
ref_words = st.lists(st.sampled_from(TINY), min_size=1, max_size=10)
hyp_words = st.lists(st.sampled_from(TINY), min_size=0, max_size=10)
FAST = settings(max_examples=150, deadline=None)


# --- WER / CER against jiwer -------------------------------------------------------

# Hand-made cases whose best alignment has one S/D/I split only, so jiwer's
# process_words must give the same counts (source: jiwer).
UNIQUE_SPLIT = [
    ("a b c", "a c", (0, 1, 0)),
    ("a b c", "a x c", (1, 0, 0)),
    ("a c", "a b c", (0, 0, 1)),
    ("the cat sat", "the cat sat on the mat", (0, 0, 3)),
    ("ferry to orla pier", "ferry orla peer", (1, 1, 0)),
    ("one two", "", (0, 2, 0)),
]


@pytest.mark.parametrize("ref,hyp,sdi", UNIQUE_SPLIT)
def test_counts_match_jiwer_on_hand_made_cases(ref, hyp, sdi):
    s, d, i, n = edit_counts(ref.split(), hyp.split())
    out = jiwer.process_words(ref, hyp)  # source: jiwer
    assert (s, d, i) == sdi == (out.substitutions, out.deletions, out.insertions)
    assert n == len(ref.split())
    assert wer(ref, hyp) == pytest.approx(jiwer.wer(ref, hyp))  # source: jiwer
    assert cer(ref, hyp) == pytest.approx(jiwer.cer(ref, hyp))  # source: jiwer


@FAST
@given(ref_words, hyp_words)
def test_wer_and_counts_match_jiwer_on_random_cases(ref, hyp):
    r, h = " ".join(ref), " ".join(hyp)
    s, d, i, n = edit_counts(ref, hyp)
    out = jiwer.process_words(r, h)  # source: jiwer
    assert s + d + i == out.substitutions + out.deletions + out.insertions
    assert wer(r, h) == pytest.approx(jiwer.wer(r, h))
    # Several best alignments may exist; ours keeps the fewest substitutions,
    # so it matches at least as many words as jiwer's alignment does.
    assert n - s - d >= out.hits
    assert d - i == len(ref) - len(hyp)


@FAST
@given(ref_words, hyp_words)
def test_cer_matches_jiwer_on_random_cases(ref, hyp):
    r, h = " ".join(ref), " ".join(hyp)
    assert cer(r, h) == pytest.approx(jiwer.cer(r, h))  # source: jiwer (spaces count as characters)


def test_textbook_character_example():
    # Classic textbook pair (from memory): "intention" -> "execution" has
    # Levenshtein distance 5 with unit costs; the book's alignment is
    # D S S C I S followed by "tion" matched: 3 S, 1 D, 1 I.
    s, d, i, n = edit_counts("intention", "execution")
    assert (s, d, i, n) == (3, 1, 1, 9)
    assert cer("intention", "execution") == pytest.approx(5 / 9)


def test_worked_word_example():
    # Worked by hand: ref  the ferry leaves pier four at noon
    #                 hyp  a   ferry leaves pier for  at noon today
    # the->a (S), four->for (S), today inserted (I): 3 errors over 7 words.
    ref = "the ferry leaves pier four at noon"
    hyp = "a ferry leaves pier for at noon today"
    assert edit_counts(ref.split(), hyp.split()) == (2, 0, 1, 7)
    assert wer(ref, hyp) == pytest.approx(3 / 7)
    assert align(ref.split(), hyp.split())[-1] == ("I", None, 7)


def _all_alignments(n, m):
    """Every alignment of lengths n, m as op sequences (brute force)."""
    if n == 0 and m == 0:
        yield ()
        return
    if n and m:
        for rest in _all_alignments(n - 1, m - 1):
            yield rest + ("M",)
    if n:
        for rest in _all_alignments(n - 1, m):
            yield rest + ("D",)
    if m:
        for rest in _all_alignments(n, m - 1):
            yield rest + ("I",)


def _cost(ref, hyp, ops):
    i = j = edits = subs = 0
    for op in ops:
        if op == "M":
            subs += ref[i] != hyp[j]
            edits += ref[i] != hyp[j]
            i, j = i + 1, j + 1
        elif op == "D":
            edits, i = edits + 1, i + 1
        else:
            edits, j = edits + 1, j + 1
    return edits, subs


@settings(max_examples=60, deadline=None)
@given(st.lists(st.sampled_from("xy"), max_size=5), st.lists(st.sampled_from("xy"), max_size=5))
def test_alignment_is_optimal_against_brute_force(ref, hyp):
    # Brute force: enumerate every alignment, keep the fewest edits, then the fewest substitutions.
    best = min(_cost(ref, hyp, ops) for ops in _all_alignments(len(ref), len(hyp)))
    ops = align(ref, hyp)
    s, d, i, _ = edit_counts(ref, hyp)
    assert (s + d + i, s) == best
    # The ops form a valid alignment: every index once, in order, C on equal tokens only.
    assert [r for _, r, _ in ops if r is not None] == list(range(len(ref)))
    assert [h for _, _, h in ops if h is not None] == list(range(len(hyp)))
    for op, r, h in ops:
        if op in "CS":
            assert (ref[r] == hyp[h]) == (op == "C")


def test_tie_break_is_the_documented_one():
    # Fewest substitutions first: "a b" / "b c" keeps b matched (D, C, I), not two S.
    assert align(["a", "b"], ["b", "c"]) == [("D", 0, None), ("C", 1, 0), ("I", None, 1)]
    # Then, tracing back from the end, a substitution is preferred over an insertion.
    assert align(["a"], ["b", "b"]) == [("I", None, 0), ("S", 0, 1)]


def test_empty_reference_and_hypothesis():
    assert wer("", "") == 0.0 and cer("", "") == 0.0
    assert wer("", "kell") is None and cer("", "kell") is None
    assert wer("kell", "") == 1.0
    assert align([], []) == []
    c = score_utterance("", "", ["kell"])
    assert c["ref_words"] == 0 and c["word_errors"] == 0 and c["false_trigger"] == 0
    c = score_utterance("", "kell", ["kell"])
    assert c["biased_insertions"] == 1 and c["false_trigger"] == 1


# --- biased-word metrics (worked by hand) ------------------------------------------

LIST = ["orla", "kell", "brannock"]


def test_uwer_bwer_precision_recall_worked_example():
    # Definitions: U-/B-WER from Le et al., Interspeech 2021; P/R from Jain et al., Interspeech 2020.
    # ref  call orla  at kell          pier      biased ref words: orla, kell (2); unbiased 3
    # hyp  call orlah at kell brannock pier
    # orla->orlah: S on a biased word (B); brannock inserted and in the list (B).
    # B-WER = 2/2, U-WER = 0/3; recall = kell / 2 = 1/2;
    # hyp list words: kell, brannock -> precision 1/2; F1 = 1/2.
    c = score_utterance("call orla at kell pier", "call orlah at kell brannock pier", LIST)
    assert (c["biased_errors"], c["unbiased_errors"], c["biased_insertions"]) == (2, 0, 1)
    s = summarize([c])
    assert s["bwer"] == 1.0 and s["uwer"] == 0.0 and s["wer"] == pytest.approx(2 / 5)
    assert s["recall"] == 0.5 and s["precision"] == 0.5 and s["f1"] == 0.5


def test_unlisted_insertion_counts_to_uwer():
    # "the" is not in the list, so its insertion is an unbiased error (Le et al., 2021).
    c = score_utterance("call orla", "call the orla", LIST)
    assert (c["unbiased_errors"], c["biased_errors"], c["unbiased_insertions"]) == (1, 0, 1)
    s = summarize([c])
    assert s["uwer"] == 1.0 and s["bwer"] == 0.0 and s["recall"] == 1.0 and s["precision"] == 1.0


def test_biased_word_replaced_by_other_list_word_hurts_recall_and_precision():
    # ref "ask maren", hyp "ask marin", both in the list: one S on a biased word;
    # recall 0/1, precision 0/1 (marin is a list word but wrong), F1 = 0.
    s = summarize([score_utterance("ask maren", "ask marin", ["maren", "marin"])])
    assert s["bwer"] == 1.0 and s["recall"] == 0.0 and s["precision"] == 0.0 and s["f1"] == 0.0


def test_false_trigger_rate_worked_example():
    # utt 1: no list word in ref, "kell" in hyp         -> false trigger
    # utt 2: list word in ref                           -> not in the denominator
    # utt 3: no list word in ref nor hyp                -> no trigger
    # rate = 1 / 2
    counts = [
        score_utterance("the ferry is late", "the ferry is kell", ["kell"]),
        score_utterance("go to kell", "go to kell", ["kell"]),
        score_utterance("the tide is high", "the tide is high", ["kell"]),
    ]
    s = summarize(counts)
    assert s["false_trigger_rate"] == 0.5 and s["n_false_triggers"] == 1 and s["n_utts"] == 3


def test_per_class_counts():
    # orla (invented_name) substituted, kell (rare_word) correct, brannock (compound) inserted:
    # the biased insertion counts to the class of the inserted word, so class errors add up to
    # the biased errors (worked example, ours).
    classes = {"orla": "invented_name", "kell": "rare_word", "brannock": "compound"}
    c = score_utterance("call orla at kell pier", "call orlah at kell brannock pier", LIST, classes)
    assert c["class:invented_name:errors"] == 1 and c["class:invented_name:words"] == 1
    assert c["class:rare_word:correct"] == 1 and c["class:rare_word:errors"] == 0
    assert c["class:compound:errors"] == 1 and c["class:compound:words"] == 0
    assert sum(v for k, v in c.items() if k.startswith("class:") and k.endswith(":errors")) == c["biased_errors"] == 2
    s = summarize([c])
    assert s["bwer:compound"] is None  # no compound in the reference: no rate, the error is still counted
    assert s["bwer:invented_name"] == 1.0 and s["recall:invented_name"] == 0.0
    assert s["bwer:rare_word"] == 0.0 and s["recall:rare_word"] == 1.0
    assert s["n_biased_words:rare_word"] == 1


def test_phrase_entries_cover_all_their_words():
    assert covering_entries("to north pier now".split(), ["north pier", "pier"]) == [
        None, "north pier", "north pier", None,
    ]
    # ref "south pier" holds no entry; hyp "north pier" does: both hyp words are
    # list words, "pier" is matched, so precision 1/2 and a false trigger.
    s = summarize([score_utterance("south pier", "north pier", ["north pier"])])
    assert s["precision"] == 0.5 and s["recall"] is None and s["false_trigger_rate"] == 1.0


def test_rates_with_empty_denominators_are_none():
    s = summarize([])
    assert all(s[k] is None for k in ("wer", "cer", "uwer", "bwer", "precision", "recall", "f1",
                                      "false_trigger_rate"))
    s = summarize([score_utterance("a b", "a c")])  # no biasing list at all
    assert s["bwer"] is None and s["recall"] is None and s["precision"] is None and s["f1"] is None
    assert s["uwer"] == 0.5 and s["false_trigger_rate"] == 0.0
    s = summarize([score_utterance("go to kell", "go to kell", ["kell"])])
    assert s["false_trigger_rate"] is None


@FAST
@given(ref_words, hyp_words, st.sets(st.sampled_from(TINY)))
def test_biased_and_unbiased_errors_add_up(ref, hyp, blist):
    # Invariant of the U/B split (Le et al., 2021): one alignment, every error in exactly one class.
    c = score_utterance(" ".join(ref), " ".join(hyp), sorted(blist))
    assert c["biased_errors"] + c["unbiased_errors"] == c["word_errors"]
    assert c["biased_ref_words"] + c["unbiased_ref_words"] == c["ref_words"]
    assert c["biased_insertions"] + c["unbiased_insertions"] == c["insertions"]
    assert c["biased_correct"] <= c["biased_ref_words"] and c["hyp_list_correct"] <= c["hyp_list_words"]
    assert c["word_errors"] == sum(edit_counts(ref, hyp)[:3])


# --- paired bootstrap ---------------------------------------------------------------


def _toy_systems(n=200, seed=1):
    rng = np.random.default_rng(seed)
    den = rng.integers(5, 20, size=n)
    err_a = rng.binomial(den, 0.20)
    err_b = rng.binomial(den, 0.15)
    return err_a, err_b, den


def test_identical_systems_give_zero_delta():
    a, _, den = _toy_systems()
    r = paired_bootstrap(a, a, den, n_resamples=500)
    assert r["delta"] == 0.0 and r["low"] == 0.0 and r["high"] == 0.0
    assert r["p_improvement"] == 0.5  # ties count half
    assert r["rate_a"] == pytest.approx(a.sum() / den.sum())


def test_clearly_better_system_has_high_probability_of_improvement():
    a, _, den = _toy_systems()
    b = a // 2  # half the errors in every utterance
    r = paired_bootstrap(a, b, den, n_resamples=1000)
    assert r["p_improvement"] > 0.99 and r["high"] < 0
    assert r["low"] <= r["delta"] <= r["high"]


def test_interval_matches_scipy_paired_percentile_bootstrap():
    # Source: scipy.stats.bootstrap (paired=True, method="percentile") on the same data;
    # both are Monte-Carlo, so the ends agree within a share of the interval width.
    a, b, den = _toy_systems()
    ours = paired_bootstrap(a, b, den, n_resamples=4000, seed=3)

    def delta(ea, eb, d, axis=-1):
        return eb.sum(axis=axis) / d.sum(axis=axis) - ea.sum(axis=axis) / d.sum(axis=axis)

    ref = scipy.stats.bootstrap(
        (a, b, den), delta, paired=True, vectorized=True, method="percentile",
        n_resamples=4000, confidence_level=0.95, rng=np.random.default_rng(4),
    )
    width = ref.confidence_interval.high - ref.confidence_interval.low
    assert ours["low"] == pytest.approx(ref.confidence_interval.low, abs=0.1 * width)
    assert ours["high"] == pytest.approx(ref.confidence_interval.high, abs=0.1 * width)
    assert ours["delta"] == pytest.approx(delta(a, b, den))


def test_bootstrap_is_seeded_and_drops_empty_resamples():
    a, b, den = _toy_systems()
    assert paired_bootstrap(a, b, den, seed=7) == paired_bootstrap(a, b, den, seed=7)
    assert paired_bootstrap(a, b, den, seed=7) != paired_bootstrap(a, b, den, seed=8)
    # Only one utterance of 50 has biased words: some resamples miss it and are dropped.
    den = np.zeros(50, dtype=int)
    den[0] = 2
    r = paired_bootstrap(np.eye(1, 50, dtype=int)[0], np.zeros(50), den, n_resamples=400)
    assert 0 < r["n_used"] < 400 and r["delta"] == -0.5
    assert math.isclose(r["n_used"] / 400, 1 - (49 / 50) ** 50, abs_tol=0.08)  # P(drawn at least once)
    r = paired_bootstrap([0, 1], [1, 0], [0, 0])
    assert r["rate_a"] is None and r["low"] is None and r["p_improvement"] is None


def test_bootstrap_rejects_bad_input():
    with pytest.raises(ValueError, match="equal length"):
        paired_bootstrap([1, 2], [1], [3, 3])
    with pytest.raises(ValueError, match="level"):
        paired_bootstrap([1], [1], [2], level=95)


def test_compare_systems_uses_the_named_rate():
    refs = ["call orla now", "kell pier", "the ferry"]
    lists = [["orla"], ["kell"], ["kell"]]
    hyps_a = ["call orlah now", "kel pier", "the ferry"]
    sys_a = [score_utterance(r, h, b) for r, h, b in zip(refs, hyps_a, lists)]
    sys_b = [score_utterance(r, r, b) for r, b in zip(refs, lists)]
    r = compare_systems(sys_a, sys_b, rate="bwer", n_resamples=200)
    assert r["rate_a"] == 1.0 and r["rate_b"] == 0.0 and r["delta"] == -1.0
    with pytest.raises(ValueError, match="unknown rate"):
        compare_systems(sys_a, sys_b, rate="accuracy")
    with pytest.raises(ValueError, match="same utterances"):
        compare_systems(sys_a, sys_b[:2])


def test_brute_force_enumerates_every_alignment():
    # The number of alignments of lengths n, m is the Delannoy number (from memory:
    # D(1, 1) = 3, D(2, 2) = 13, D(3, 3) = 63), so the brute force above misses none.
    assert [sum(1 for _ in _all_alignments(k, k)) for k in (1, 2, 3)] == [3, 13, 63]


def test_several_labels_per_entry_and_uwer_parts_add_up():
    # A name carries its class and its name style; U-WER parts (substitutions and deletions,
    # insertions next to a biased error, other insertions) add up to U-WER. Worked example, ours:
    # ref  "call kalvin at the pier now"   (kalvin biased; 5 unbiased words)
    # hyp  "call kal vin at a pier now so" -> kalvin->kal (S, biased), vin (I next to it),
    #      the->a (S, unbiased), so (I, unbiased, not next to a biased error)
    labels = {"kalvin": ("invented_name", "style:reed")}
    c = score_utterance("call kalvin at the pier now", "call kal vin at a pier now so", ["kalvin"], labels)
    assert c["class:style:reed:errors"] == c["class:invented_name:errors"] == 1
    assert (c["unbiased_subdel"], c["unbiased_insertions_near_biased"], c["unbiased_insertions"]) == (1, 1, 2)
    s = summarize([c])
    assert s["uwer"] == pytest.approx(3 / 5)
    assert s["uwer_subdel"] + s["uwer_ins_near_biased"] + s["uwer_ins_other"] == pytest.approx(s["uwer"])
    assert s["bwer:style:reed"] == 1.0


def test_compare_systems_pairs_by_id_and_refuses_mismatched_sets():
    a = {"u1": score_utterance("a b", "a c"), "u2": score_utterance("c d", "c d")}
    b = {"u2": score_utterance("c d", "c x"), "u1": score_utterance("a b", "a b")}  # other order
    r = compare_systems(a, b, n_resamples=200)
    assert r["rate_a"] == r["rate_b"] == 0.25  # the same utterances, matched by id not position
    with pytest.raises(ValueError, match="different utterances"):
        compare_systems(a, {"u1": a["u1"], "u3": a["u2"]})
