"""Intervals: closed forms against published examples and statsmodels, and
coverage by simulation with a known truth (fixed seeds, 400 replications: a
correct 95% interval covers 0.95 +/- 0.021 at two binomial standard errors)."""

import warnings

import numpy as np
import pytest
from scipy import stats

from evenflag.metrics.inputs import FlagRule, MetricInput, MetricNaNWarning, rethreshold
from evenflag.metrics.intervals import delong_components, katz_ratio, newcombe_difference, wilson
from evenflag.metrics.suites import evaluate

REPS = 400


# ---------------------------------------------------------------- closed forms
def test_newcombe_worked_example():
    # Newcombe (1998), Statistics in Medicine 17:873-890, Table II example (a):
    # 56/70 against 48/80, hybrid score interval (method 10) 0.0524 to 0.3339
    # (values from memory; statsmodels below gives the same to 1e-12).
    low, high = newcombe_difference(56, 70, 48, 80)
    assert (float(low), float(high)) == pytest.approx((0.0524, 0.3339), abs=5e-5)


@pytest.mark.parametrize("seed", range(3))
def test_closed_forms_match_statsmodels(seed):
    # Reference library: statsmodels.stats.proportion (Wilson; Newcombe 'newcomb'
    # for a difference; 'log' = Katz for a ratio).
    from statsmodels.stats.proportion import confint_proportions_2indep, proportion_confint

    rng = np.random.default_rng(seed)
    for _ in range(40):
        n1, n2 = rng.integers(5, 400, size=2)
        x1, x2 = rng.integers(0, n1 + 1), rng.integers(0, n2 + 1)
        assert np.allclose(wilson(x1, n1), proportion_confint(x1, n1, method="wilson"), atol=1e-12)
        assert np.allclose(newcombe_difference(x1, n1, x2, n2),
                           confint_proportions_2indep(x1, n1, x2, n2, method="newcomb", compare="diff"), atol=1e-12)
        if x1 and x2:
            assert np.allclose(katz_ratio(x1, n1, x2, n2),
                               confint_proportions_2indep(x1, n1, x2, n2, method="log", compare="ratio"), atol=1e-12)


def _delong_direct(pos, neg):
    """DeLong, DeLong and Clarke-Pearson (1988), Biometrics 44:837-845, straight from
    the definitions: psi(x, y) = 1, 1/2, 0 for x > y, x = y, x < y; V10(x_i) is the
    mean of psi(x_i, y) over negatives, V01(y_j) the mean over positives;
    var = S10 / m + S01 / n with sample variances S. O(m n), no ranks."""
    psi = (pos[:, None] > neg[None, :]) + 0.5 * (pos[:, None] == neg[None, :])
    v10, v01 = psi.mean(axis=1), psi.mean(axis=0)
    return psi.mean(), v10.var(ddof=1) / len(pos) + v01.var(ddof=1) / len(neg)


@pytest.mark.parametrize("seed", range(4))
def test_delong_matches_the_published_definition_with_ties(seed):
    rng = np.random.default_rng(seed)
    pos = np.round(rng.normal(1, 1, size=rng.integers(5, 80)), 1)
    neg = np.round(rng.normal(0, 1, size=rng.integers(5, 120)), 1)
    auc, variance = delong_components(pos, neg)
    expected_auc, expected_variance = _delong_direct(pos, neg)
    assert auc == pytest.approx(expected_auc, abs=1e-12)
    assert variance == pytest.approx(expected_variance, rel=1e-9)


def test_delong_on_the_hanley_mcneil_ratings():
    # Hanley and McNeil (1982), Radiology 143:29-36, Table 1: 5-point ratings of 58
    # normal and 51 abnormal CT images; AUC 0.893 with SE 0.032 by their formula
    # (values from memory). DeLong's SE differs from that approximation slightly.
    pos = np.repeat([1, 2, 3, 4, 5], [3, 2, 2, 11, 33])
    neg = np.repeat([1, 2, 3, 4, 5], [33, 6, 6, 11, 2])
    auc, variance = delong_components(pos, neg)
    assert auc == pytest.approx(0.893, abs=5e-4)
    assert np.sqrt(variance) == pytest.approx(0.032, abs=0.003)


def test_bootstrap_auroc_interval_agrees_with_delong():
    # DeLong is the reference interval for AUROC; a row bootstrap of the same data
    # must give nearly the same interval.
    from evenflag.metrics.bootstrap import percentile_interval, resample_weights
    from evenflag.metrics.detection import detection_from_counts

    rng = np.random.default_rng(8)
    label = (rng.random(3000) < 0.1).astype(int)
    score = rng.normal(size=3000) + 1.2 * label
    group = rng.choice(["a", "b"], 3000)
    inputs = MetricInput.build(label, score, None, group)
    warnings.simplefilter("ignore", MetricNaNWarning)
    draws = np.concatenate([detection_from_counts(inputs.counts(w))["auroc"]
                            for w in resample_weights(inputs, 1000, np.random.default_rng(0))])
    low, high = percentile_interval(draws)
    v = evaluate(["detection"], label, score, None, group, n_bootstrap=20).values
    width = v["auroc.ci_high"] - v["auroc.ci_low"]
    assert abs(low - v["auroc.ci_low"]) < 0.1 * width and abs(high - v["auroc.ci_high"]) < 0.1 * width


# ---------------------------------------------------------------- flag rules
@pytest.mark.parametrize("seed", range(3))
def test_rethreshold_reproduces_the_flags(seed):
    rng = np.random.default_rng(seed)
    label = (rng.random(500) < 0.1).astype(int)
    score = np.round(rng.normal(size=500) + label, 1)  # ties straddle the cut
    group = rng.choice(["a", "b", "c"], 500)
    from evenflag.thresholds import ThresholdSpec, flag_scores

    for policy, rule in (("top_fraction", FlagRule("top_fraction", 0.07)), ("true_rate", FlagRule("top_anomalies"))):
        flag = flag_scores(ThresholdSpec(policy, 0.07), score, test_labels=label)
        inputs = MetricInput.build(label, score, flag, group)
        again = rethreshold(inputs.counts(), rule)
        assert np.array_equal(again.flagged, inputs.counts().flagged)


# ---------------------------------------------------------------- degenerate intervals
def test_small_group_without_flags_gets_a_marked_score_interval():
    # An 11-row group with no flags next to a 289-row group with 16: Fisher's exact
    # test sees nothing (scipy.stats.fisher_exact), and the interval of the
    # difference must cover 0 and be marked, not shown as a precise value.
    flag = np.r_[np.zeros(11), np.ones(16), np.zeros(273)].astype(bool)
    group = np.array(["small"] * 11 + ["large"] * 289)
    label = np.zeros(300, int)
    label[::20] = 1
    score = np.arange(300.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", MetricNaNWarning)
        result = evaluate(["flag_fairness"], label, score, flag, group, n_bootstrap=200,
                          rule=FlagRule("top_fraction", 16 / 300))
    v = result.values
    assert stats.fisher_exact([[0, 11], [16, 273]]).pvalue > 0.5
    assert v["flag_rate_diff/small.ci_low"] < 0 < v["flag_rate_diff/small.ci_high"]
    assert v["flag_rate_diff/small.ci_degenerate"] == 1.0
    assert v["flag_rate_vs_reference/small.ci_low"] < 1 < v["flag_rate_vs_reference/small.ci_high"]
    assert v["flag_rate_vs_reference/small.ci_degenerate"] == 1.0
    assert v["flag_rate/small.ci_high"] > 0 and v["flag_rate/small.ci_degenerate"] == 1.0
    assert "flag_rate_diff/small" in result.notes["interval_methods"].split('"newcombe"')[1]
    for key in ("flag_rate_ratio", "flag_rate_gap", "score_distance", "false_flag_gap"):
        assert f"{key}.ci_low" not in v  # max-minus-min summaries: point estimate only


def test_summary_keys_have_no_interval_and_signed_keys_do():
    rng = np.random.default_rng(0)
    label = (rng.random(3000) < 0.1).astype(int)
    group = rng.choice(["a", "b"], 3000, p=[0.7, 0.3])
    score = rng.normal(size=3000) + 1.5 * label + 0.4 * (group == "b")
    flag = score >= np.quantile(score, 0.9)
    families = ["detection", "flag_fairness", "score_fairness"]
    one = evaluate(families, label, score, flag, group, n_bootstrap=200, seed=4,
                   rule=FlagRule("top_fraction", 0.1)).values
    two = evaluate(families, label, score, flag, group, n_bootstrap=200, seed=4,
                   rule=FlagRule("top_fraction", 0.1)).values
    for key in ("auroc", "average_precision", "flag_rate_diff/b", "flag_rate_vs_reference/b", "score_shift/b",
                "auroc_diff/b", "false_flag_diff/b", "flag_rate/a", "r_precision"):
        assert one[f"{key}.ci_low"] <= one[key] <= one[f"{key}.ci_high"], key
        assert one[f"{key}.ci_low"] < one[f"{key}.ci_high"], key
        assert one[f"{key}.ci_low"] == two[f"{key}.ci_low"], key
        assert f"{key}.ci_degenerate" not in one
    for key in ("flag_rate_ratio", "flag_rate_gap", "score_distance", "score_ks", "group_auroc_gap"):
        assert f"{key}.ci_low" not in one
    # The reference group is the largest; its own signed keys do not exist.
    assert "flag_rate_diff/a" not in one and one["flag_rate_diff/b"] == pytest.approx(one["flag_rate/b"] - one["flag_rate/a"])


def test_unknown_reference_group_is_one_line():
    from evenflag.errors import MetricInputError

    with pytest.raises(MetricInputError, match=r"reference_group 'c' is not a group value here; use one of \['a', 'b'\]"):
        evaluate(["flag_fairness"], [0, 1, 0, 1], [1, 2, 3, 4], [0, 1, 0, 1], ["a", "a", "b", "b"], reference_group="c")


# ---------------------------------------------------------------- coverage by simulation
def _population(rng, n, rate_a, rate_b, shift):
    b = rng.random(n) < 0.3
    label = (rng.random(n) < np.where(b, rate_b, rate_a)).astype(int)
    score = rng.normal(size=n) + 1.5 * label + shift * b
    return label, score, np.where(b, "b", "a")


def _truth(rate_a, rate_b, shift):
    """Population values from 2 million rows of the same law, top 5% cut."""
    label, score, group = _population(np.random.default_rng(99), 2_000_000, rate_a, rate_b, shift)
    cut = np.quantile(score, 0.95)
    flag = score > cut
    rates = {g: flag[group == g].mean() for g in ("a", "b")}
    return cut, rates["b"] - rates["a"], rates["b"] / rates["a"]


def _coverage(rate_a, rate_b, shift, keys, fixed_cut=False, n=2000, seed=0):
    cut, diff, ratio = _truth(rate_a, rate_b, shift)
    truth = {"flag_rate_diff/b": diff, "flag_rate_vs_reference/b": ratio}
    rng = np.random.default_rng(seed)
    hits = dict.fromkeys(keys, 0)
    for rep in range(REPS):
        label, score, group = _population(rng, n, rate_a, rate_b, shift)
        if fixed_cut:
            flag, rule = score > cut, None
        else:
            flag, rule = score >= np.partition(score, n - 100)[n - 100], FlagRule("top_fraction", 0.05)
        v = evaluate(["flag_fairness"], label, score, flag, group, n_bootstrap=200, seed=rep, rule=rule,
                     reference_group="a").values
        for key in keys:
            hits[key] += v[f"{key}.ci_low"] <= truth[key] <= v[f"{key}.ci_high"]
    return {k: h / REPS for k, h in hits.items()}


@pytest.mark.slow
def test_coverage_of_the_flag_rate_difference_and_ratio_at_parity():
    # Same base rate and score law in both groups: the difference is 0 and the
    # ratio 1. (Before, the max-minus-min gap's interval never contained 0.)
    cover = _coverage(0.05, 0.05, 0.0, ["flag_rate_diff/b", "flag_rate_vs_reference/b"])
    assert 0.93 <= cover["flag_rate_diff/b"] <= 0.97
    assert 0.93 <= cover["flag_rate_vs_reference/b"] <= 0.97


@pytest.mark.slow
def test_coverage_of_the_flag_rate_difference_off_parity():
    # Base rates 5% and 10% and a score shift: the top-5% rule is re-applied in
    # every resample (the threshold is estimated from the same rows).
    cover = _coverage(0.05, 0.10, 0.5, ["flag_rate_diff/b"])
    assert 0.93 <= cover["flag_rate_diff/b"] <= 0.97


@pytest.mark.slow
def test_coverage_of_newcombe_and_katz_with_a_fixed_cut():
    # A cut learned elsewhere (train_quantile): flags are Bernoulli per row and the
    # closed forms apply (counts below 5 use them too).
    cover = _coverage(0.05, 0.10, 0.5, ["flag_rate_diff/b", "flag_rate_vs_reference/b"], fixed_cut=True, n=600)
    assert 0.93 <= cover["flag_rate_diff/b"] <= 0.97
    assert 0.93 <= cover["flag_rate_vs_reference/b"] <= 0.97


@pytest.mark.slow
def test_coverage_of_auroc():
    from sklearn.metrics import roc_auc_score

    big_label, big_score, _ = _population(np.random.default_rng(98), 1_000_000, 0.05, 0.10, 0.5)
    truth = roc_auc_score(big_label, big_score)  # reference library: scikit-learn
    rng = np.random.default_rng(1)
    hits = 0
    for rep in range(REPS):
        label, score, group = _population(rng, 2000, 0.05, 0.10, 0.5)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", MetricNaNWarning)  # no flags given: flag metrics undefined
            v = evaluate(["detection"], label, score, None, group, n_bootstrap=20, seed=rep).values
        hits += v["auroc.ci_low"] <= truth <= v["auroc.ci_high"]
    assert 0.92 <= hits / REPS <= 0.975
