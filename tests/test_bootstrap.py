"""Our paired bootstrap (score.compare_systems) against scipy.stats.bootstrap and against exact
enumeration, on the rates the report compares: WER, U-WER, B-WER and biased-word recall, each a ratio of sums
(total errors / total words within each resample, Bisani & Ney, ICASSP 2004)."""

from __future__ import annotations

import itertools
import random

import numpy as np
import pytest
import scipy.stats

from tinyrnnt.score import RATE_KEYS, compare_systems, score_utterance


def ratio_delta(err_a, err_b, words, axis=-1):
    """B's rate minus A's, each total errors / total words of the resample (the statistic both sides use)."""
    return err_b.sum(axis=axis) / words.sum(axis=axis) - err_a.sum(axis=axis) / words.sum(axis=axis)


def pier_case():
    """The known case (ours, invented): sixty utterances "call NAME at the pier", NAME in the list.
    System A misspells the name in every third utterance and drops "the" in every fifth; system B
    misspells it in every seventh and says "now" after every fourth. Ids in a shuffled order for B."""
    names = ["orla", "kell", "tavin", "morrow", "selka"]
    a, b = {}, {}
    for i in range(60):
        name = names[i % len(names)]
        ref = f"call {name} at the pier"
        hyp_a = f"call {name + 'h' if i % 3 == 0 else name} at {'' if i % 5 == 0 else 'the '}pier"
        hyp_b = f"call {name[:-1] if i % 7 == 0 else name} at the pier{' now' if i % 4 == 0 else ''}"
        a[f"u{i:02d}"] = score_utterance(ref, hyp_a, [name, "skellig"])
        b[f"u{i:02d}"] = score_utterance(ref, hyp_b, [name, "skellig"])
    ids = list(b)
    random.Random(0).shuffle(ids)
    return a, {i: b[i] for i in ids}


@pytest.mark.parametrize("rate", ["wer", "uwer", "bwer", "recall"])
def test_compare_systems_matches_scipy_paired_percentile_bootstrap_on_the_pier_case(rate):
    # Source: scipy.stats.bootstrap(paired=True, method="percentile") with the same ratio-of-sums
    # statistic on the same per-utterance counts (paired by id on our side, by position on scipy's).
    # Both draw 20,000 resamples at random, so the ends agree within a small share of the width and
    # the probability of improvement within Monte-Carlo error (its standard error here <= 0.0036).
    a, b = pier_case()
    ours = compare_systems(a, b, rate=rate, n_resamples=20000, seed=0)
    num, den = RATE_KEYS[rate]
    ids = sorted(a)
    err_a, err_b, words = (np.array([s[i][k] for i in ids]) for s, k in ((a, num), (b, num), (a, den)))
    assert words.min() > 0  # every utterance has words of this kind: no resample is dropped on either side
    ref = scipy.stats.bootstrap((err_a, err_b, words), ratio_delta, paired=True, vectorized=True,
                                method="percentile", n_resamples=20000, confidence_level=0.95,
                                rng=np.random.default_rng(1))
    ci = ref.confidence_interval
    width = ci.high - ci.low
    assert width > 0
    assert ours["low"] == pytest.approx(ci.low, abs=0.05 * width)
    assert ours["high"] == pytest.approx(ci.high, abs=0.05 * width)
    dist = ref.bootstrap_distribution
    p_scipy = np.mean(dist < 0) + 0.5 * np.mean(dist == 0)  # ties count half, as ours
    assert ours["p_improvement"] == pytest.approx(p_scipy, abs=0.015)
    assert ours["delta"] == pytest.approx(ratio_delta(err_a, err_b, words))
    assert ours["n_used"] == 20000


def test_known_rates_of_the_pier_case():
    # Worked by hand from the case's rules: 60 names, A misspells 20 (i % 3 == 0), B 9 (i % 7 == 0);
    # 240 other words, A drops 12 (i % 5 == 0), B inserts 15 (i % 4 == 0).
    a, b = pier_case()
    bwer = compare_systems(a, b, rate="bwer", n_resamples=10)
    uwer = compare_systems(a, b, rate="uwer", n_resamples=10)
    assert (bwer["rate_a"], bwer["rate_b"]) == pytest.approx((20 / 60, 9 / 60))
    assert (uwer["rate_a"], uwer["rate_b"]) == pytest.approx((12 / 240, 15 / 240))
    recall = compare_systems(a, b, rate="recall", n_resamples=10)  # 40 and 51 of the 60 names right
    assert (recall["rate_a"], recall["rate_b"], recall["delta"]) == pytest.approx((40 / 60, 51 / 60, 11 / 60))


def test_probability_of_improvement_matches_exact_enumeration_of_every_resample():
    # Four utterances: all 4**4 = 256 resamples are equally likely, so the bootstrap distribution of
    # the ratio-of-sums difference is known exactly; 20,000 random resamples must agree within
    # Monte-Carlo error (standard error <= 0.0036), and so must scipy's.
    counts_a = [{"word_errors": e, "ref_words": w} for e, w in ((2, 5), (0, 3), (1, 4), (3, 6))]
    counts_b = [{"word_errors": e, "ref_words": w} for e, w in ((1, 5), (1, 3), (0, 4), (3, 6))]
    err_a, err_b, words = (np.array([c[k] for c in cs]) for cs, k in
                           ((counts_a, "word_errors"), (counts_b, "word_errors"), (counts_a, "ref_words")))
    exact = np.array([ratio_delta(err_a[list(i)], err_b[list(i)], words[list(i)])
                      for i in itertools.product(range(4), repeat=4)])
    p_exact = np.mean(exact < -1e-12) + 0.5 * np.mean(np.abs(exact) <= 1e-12)
    ours = compare_systems(counts_a, counts_b, rate="wer", n_resamples=20000, seed=5)
    assert ours["p_improvement"] == pytest.approx(p_exact, abs=0.015)
    assert exact.min() <= ours["low"] <= ours["high"] <= exact.max()
    ref = scipy.stats.bootstrap((err_a, err_b, words), ratio_delta, paired=True, vectorized=True,
                                method="percentile", n_resamples=20000, rng=np.random.default_rng(6))
    dist = ref.bootstrap_distribution
    assert np.mean(dist < -1e-12) + 0.5 * np.mean(np.abs(dist) <= 1e-12) == pytest.approx(p_exact, abs=0.015)
