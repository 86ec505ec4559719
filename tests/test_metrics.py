"""Metrics against published worked examples and reference libraries."""

import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from sklearn.metrics import average_precision_score, roc_auc_score

from evenflag.errors import MetricInputError
from evenflag.metrics.detection import auroc, average_precision
from evenflag.metrics.flag_fairness import flag_rate_ratio, flag_rates, flips_to_parity, two_proportion_z
from evenflag.metrics.inputs import MetricInput, MetricNaNWarning
from evenflag.metrics.leakage import flag_overlap, leakage_auroc
from evenflag.metrics.score_fairness import score_distance, score_ks, wasserstein_raw
from evenflag.metrics.suites import evaluate

ALL = ["detection", "flag_fairness", "score_fairness"]


def _evaluate_expecting_nan(*args, expect=(), **kwargs):
    """evaluate() on inputs that leave some metrics undefined (all labels 0, say),
    capturing the NaN warnings it is meant to give; every warning must be one of
    those, and each key in ``expect`` must be named."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        result = evaluate(*args, **kwargs)
    assert caught and all(issubclass(w.category, MetricNaNWarning) for w in caught), [str(w.message) for w in caught]
    for key in expect:
        assert any(str(w.message).startswith(f"{key} is undefined") for w in caught), key
    return result


def _flags_from_counts(counts):
    """Rows for groups with (flagged, total) counts."""
    flag, group = [], []
    for name, (flagged, total) in counts.items():
        flag += [1] * flagged + [0] * (total - flagged)
        group += [name] * total
    return np.array(flag), np.array(group)


# ---------------------------------------------------------------- scipy docs
def test_wasserstein_scipy_documentation_examples():
    # scipy.stats.wasserstein_distance documentation, Examples section.
    assert wasserstein_raw([0, 1, 3], [5, 6, 8]) == pytest.approx(5.0, abs=1e-12)
    assert wasserstein_raw([0, 1], [0, 1], [3, 1], [2, 2]) == pytest.approx(0.25, abs=1e-12)
    assert wasserstein_raw([3.4, 3.9, 7.5, 7.8], [4.5, 1.4], [1.4, 0.9, 3.1, 7.2], [3.2, 3.5]) == pytest.approx(
        4.0781331438047861, abs=1e-12)


def test_score_distance_raw_and_ks_match_scipy():
    # Reference library: scipy.stats.wasserstein_distance and ks_2samp on the two groups.
    rng = np.random.default_rng(1)
    score = np.round(rng.normal(size=600), 1)  # rounding creates ties
    group = rng.choice(["x", "y"], 600)
    label = (rng.random(600) < 0.2).astype(int)
    result = evaluate(["score_fairness"], label, score, None, group)
    a, b = score[group == "x"], score[group == "y"]
    assert result.values["score_distance_raw"] == pytest.approx(stats.wasserstein_distance(a, b), abs=1e-12)
    assert result.values["score_ks"] == pytest.approx(stats.ks_2samp(a, b).statistic, abs=1e-12)
    # score_distance is scipy's distance applied to pooled empirical-CDF values.
    pooled = stats.rankdata(score, method="max") / len(score)
    assert result.values["score_distance"] == pytest.approx(
        stats.wasserstein_distance(pooled[group == "x"], pooled[group == "y"]), abs=1e-12)


# ---------------------------------------------------------------- scikit-learn
def test_sklearn_docstring_example():
    # scikit-learn docstrings of roc_auc_score / average_precision_score: y=[0,0,1,1], scores [0.1,0.4,0.35,0.8].
    assert auroc([0, 0, 1, 1], [0.1, 0.4, 0.35, 0.8]) == pytest.approx(0.75)
    assert average_precision([0, 0, 1, 1], [0.1, 0.4, 0.35, 0.8]) == pytest.approx(5 / 6)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_detection_and_group_auroc_match_sklearn_with_ties(seed):
    rng = np.random.default_rng(seed)
    n = 500
    label = (rng.random(n) < 0.15).astype(int)
    score = np.round(rng.normal(size=n) + label, 1)
    group = rng.choice(["p", "q"], n)
    flag = score >= np.quantile(score, 0.9)
    v = evaluate(ALL, label, score, flag, group).values
    # Reference library: scikit-learn metrics.
    assert v["auroc"] == pytest.approx(roc_auc_score(label, score), abs=1e-12)
    assert v["average_precision"] == pytest.approx(average_precision_score(label, score), abs=1e-12)
    for g in ("p", "q"):
        m = group == g
        assert v[f"auroc/{g}"] == pytest.approx(roc_auc_score(label[m], score[m]), abs=1e-12)
    cross = np.r_[score[(group == "p") & (label == 1)], score[(group == "q") & (label == 0)]]
    cross_label = np.r_[np.ones(((group == "p") & (label == 1)).sum()), np.zeros(((group == "q") & (label == 0)).sum())]
    assert v["cross_auroc/p_vs_q"] == pytest.approx(roc_auc_score(cross_label, cross), abs=1e-12)
    from sklearn.metrics import f1_score, precision_score, recall_score
    assert v["flag_precision"] == pytest.approx(precision_score(label, flag))
    assert v["flag_recall"] == pytest.approx(recall_score(label, flag))
    assert v["flag_f1"] == pytest.approx(f1_score(label, flag))


def test_r_precision_without_ties():
    # R-precision (Manning, Raghavan and Schuetze, Introduction to Information
    # Retrieval, section 8.4): precision among the top R, R = number of relevant items.
    label = np.array([1, 0, 1, 0, 0, 1, 0, 0])
    score = np.array([9, 8, 7, 6, 5, 4, 3, 2], dtype=float)
    # R = 3 anomalies; the top 3 scores hold 2 of them.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", MetricNaNWarning)
        assert evaluate(["detection"], label, score, None, ["a", "b"] * 4).values["r_precision"] == pytest.approx(2 / 3)


# ---------------------------------------------------------------- four-fifths rule
def test_eeoc_four_fifths_worked_example():
    # US EEOC Uniform Guidelines, 29 CFR 1607.4(D), and the official Questions and
    # Answers example: selection rates 60%, 45%, 48%, 51% against the highest (60%)
    # give 0.75 (adverse impact), 0.80 and 0.85 (not adverse impact).
    for rate, expected_ratio, passes in [(45, 0.75, 0.0), (48, 0.80, 1.0), (51, 0.85, 1.0)]:
        flag, group = _flags_from_counts({"top": (60, 100), "other": (rate, 100)})
        v = _evaluate_expecting_nan(["flag_fairness"], np.zeros(len(flag), int), None, flag, group,
                                    expect=["hit_rate/top"]).values
        assert v["flag_rate_ratio"] == pytest.approx(expected_ratio)
        assert v["four_fifths_pass"] == passes  # exactly 0.8 passes
    flag, group = _flags_from_counts({"a": (60, 100), "b": (45, 100), "c": (48, 100), "d": (51, 100)})
    assert flag_rate_ratio(flag, group) == pytest.approx(0.75)
    assert flag_rates(flag, group) == {"a": 0.6, "b": 0.45, "c": 0.48, "d": 0.51}


def test_two_proportion_z_and_fisher_against_scipy():
    # 48/80 vs 12/40 flagged: pooled z about 3.098, two-sided p about 0.00195; Fisher
    # two-sided p about 0.00341 (regression values, cross-checked against the reference
    # library scipy.stats below).
    z, p = two_proportion_z(48, 80, 12, 40)
    assert z == pytest.approx(3.098, abs=5e-4)
    assert p == pytest.approx(0.00195, abs=1e-5)
    assert p == pytest.approx(2 * stats.norm.sf(z), rel=1e-12)
    flag, group = _flags_from_counts({"high": (48, 80), "low": (12, 40)})
    v = _evaluate_expecting_nan(["flag_fairness"], np.zeros(len(flag), int), None, flag, group)
    assert v.values["worst_pair_z"] == pytest.approx(z)
    assert v.values["worst_pair_fisher_p"] == pytest.approx(stats.fisher_exact([[48, 32], [12, 28]]).pvalue)
    assert v.values["worst_pair_fisher_p"] == pytest.approx(0.00341, abs=1e-5)
    assert v.notes["flag_rate_ratio.pair"] == "low vs high"


def _flips_brute_force(flagged, rows):
    """Every way to share the same number of flags between the groups; the fewest
    flags moved (sum of the increases) among those where each group's rate is at
    least 4/5 of the highest, in exact integer arithmetic (29 CFR 1607.4(D))."""
    from itertools import product

    total, best = int(sum(flagged)), None
    for counts in product(*[range(r + 1) for r in rows]):
        if sum(counts) != total:
            continue
        rates_ok = all(5 * counts[g] * rows[h] >= 4 * counts[h] * rows[g] for g in range(len(rows)) for h in range(len(rows)))
        if rates_ok:
            moved = sum(max(c - f, 0) for c, f in zip(counts, flagged))
            best = moved if best is None else min(best, moved)
    return float("nan") if best is None else float(best)


def test_flips_to_parity_equals_brute_force():
    rng = np.random.default_rng(0)
    for _ in range(150):
        rows = rng.integers(2, 13, size=rng.integers(2, 4))
        flagged = np.array([rng.integers(0, r + 1) for r in rows])
        if flagged.sum() == 0:
            continue
        assert flips_to_parity(flagged, rows) == pytest.approx(_flips_brute_force(flagged, rows), nan_ok=True), (flagged, rows)


def test_flips_to_parity_does_not_count_an_overshoot():
    # Moving 1 flag in (2 of 59, 2 of 34) reverses the pair at ratio 0.578: not parity.
    # No way of sharing 4 flags between groups of 59 and 34 reaches 0.8.
    assert np.isnan(flips_to_parity([2, 2], [59, 34]))
    # Three groups: fixing only the worst pair leaves the third group below the line.
    assert flips_to_parity([10, 20, 30], [100, 100, 100]) == _flips_brute_force([10, 20, 30], [100, 100, 100])


# ---------------------------------------------------------------- leakage, overlap
def test_leakage_auroc_detects_group_information():
    rng = np.random.default_rng(0)
    group = rng.choice(["a", "b", "c"], 600)
    noise = rng.normal(size=(600, 4))
    informative = noise + 3 * (group[:, None] == np.array(["a", "b", "c"])[None, :4 - 1]).repeat(1, axis=1)[:, [0, 1, 2, 0]]
    assert leakage_auroc(informative, group) > 0.95
    assert abs(leakage_auroc(noise, group) - 0.5) < 0.08


def test_leakage_takes_the_stronger_of_a_linear_and_a_boosted_probe():
    # Group coded in the sign pattern of two coordinates (XOR): no linear probe
    # can read it, a tree ensemble can. The per-probe keys and the maximum say so.
    from evenflag.metrics.leakage import leakage

    rng = np.random.default_rng(1)
    embedding = rng.normal(size=(1500, 3))
    group = np.where((embedding[:, 0] > 0) ^ (embedding[:, 1] > 0), "a", "b")
    v = leakage(embedding, group, seed=0)
    assert abs(v["leakage_auroc/linear"] - 0.5) < 0.06
    assert v["leakage_auroc/boosted"] > 0.9
    assert v["leakage_auroc"] == v["leakage_auroc/boosted"]
    assert v["leakage_auroc.ci_low"] < v["leakage_auroc"] < v["leakage_auroc.ci_high"]
    assert v["leakage_auroc/linear.ci_low"] < 0.5 < v["leakage_auroc/linear.ci_high"]


def test_flag_overlap_is_jaccard():
    # Reference library: scikit-learn's jaccard_score on boolean vectors.
    from sklearn.metrics import jaccard_score

    rng = np.random.default_rng(3)
    a, b = rng.random(100) < 0.2, rng.random(100) < 0.3
    assert flag_overlap(a, b) == pytest.approx(jaccard_score(a, b))


# ---------------------------------------------------------------- properties
scores = st.lists(st.floats(-100, 100, allow_nan=False), min_size=8, max_size=60)


@pytest.mark.filterwarnings("ignore::evenflag.metrics.inputs.MetricNaNWarning")
@settings(max_examples=60, deadline=None)
@given(scores, st.randoms(use_true_random=False))
def test_relabelling_groups_leaves_ratios_unchanged(values, random):
    n = len(values)
    group = np.array([random.choice(["u", "v", "w"]) for _ in range(n)])
    group[:2] = ["u", "v"]
    flag = np.array(values) > np.median(values)
    renamed = np.array([{"u": "w2", "v": "u2", "w": "v2"}[g] for g in group])
    for key in ("flag_rate_ratio", "flag_rate_gap"):
        a = evaluate(["flag_fairness"], np.zeros(n, int), values, flag, group).values[key]
        b = evaluate(["flag_fairness"], np.zeros(n, int), values, flag, renamed).values[key]
        assert a == pytest.approx(b, nan_ok=True)
        if key == "flag_rate_ratio" and not np.isnan(a):
            assert 0.0 <= a <= 1.0


# Scores on a 0.01 grid: a strictly increasing map cannot merge them in floating point.
grid_scores = st.lists(st.integers(-10_000, 10_000).map(lambda i: i / 100), min_size=8, max_size=60)


@settings(max_examples=60, deadline=None)
@given(grid_scores)
def test_score_distance_invariant_to_increasing_transform(values):
    score = np.array(values)
    group = np.array(["a", "b"] * (len(score) // 2) + ["a"] * (len(score) % 2))
    transformed = np.exp(score / 50.0) * 3 + 1
    assert len(np.unique(transformed)) == len(np.unique(score))
    assert score_distance(score, group) == pytest.approx(score_distance(transformed, group), abs=1e-12)
    assert score_ks(score, group) == pytest.approx(score_ks(transformed, group), abs=1e-12)


@settings(max_examples=30, deadline=None)
@given(scores)
def test_identical_group_distributions_give_zero(values):
    score = np.array(values + values)
    group = np.array(["a"] * len(values) + ["b"] * len(values))
    assert score_distance(score, group) == pytest.approx(0.0, abs=1e-12)
    assert score_ks(score, group) == pytest.approx(0.0, abs=1e-12)


# ---------------------------------------------------------------- bootstrap
def _sample(n=3000, seed=0):
    rng = np.random.default_rng(seed)
    label = (rng.random(n) < 0.1).astype(int)
    group = rng.choice(["a", "b"], n, p=[0.7, 0.3])
    score = rng.normal(size=n) + 1.5 * label + 0.4 * (group == "b")
    return label, score, score >= np.quantile(score, 0.9), group


def test_bootstrap_matches_a_plain_loop_on_the_same_draws():
    # The vectorised weights must give exactly what resampling rows and
    # recomputing with scikit-learn gives, draw for draw.
    from evenflag.metrics.bootstrap import resample_weights

    label, score, flag, group = _sample(n=400, seed=2)
    inputs = MetricInput.build(label, score, flag, group)
    from evenflag.metrics.detection import detection_from_counts

    original = group.astype(object) + label.astype(str)
    for scheme in ("rows", "strata"):
        weights = next(resample_weights(inputs, 5, np.random.default_rng(0), scheme=scheme))
        batched = detection_from_counts(inputs.counts(weights))["auroc"]
        for row, w in enumerate(weights):
            rows = np.repeat(np.arange(len(label)), w.astype(int))
            assert len(rows) == len(label)
            assert batched[row] == pytest.approx(roc_auc_score(label[rows], score[rows]), abs=1e-6)
            strata = group[rows].astype(object) + label[rows].astype(str)
            kept = sorted(np.unique(strata, return_counts=True)[1]) == sorted(np.unique(original, return_counts=True)[1])
            assert kept == (scheme == "strata")  # only the stratified scheme keeps every stratum's size


# ---------------------------------------------------------------- undefined and bad input
def test_one_label_only_gives_nan_with_a_warning():
    v = _evaluate_expecting_nan(ALL, [0, 0, 0, 0], [1, 2, 3, 4], [0, 1, 0, 1], ["a", "a", "b", "b"],
                                expect=["auroc"]).values
    assert np.isnan(v["auroc"]) and v["flag_rate_ratio"] == 1.0


def test_group_without_anomalies_gives_nan_hit_rate():
    v = _evaluate_expecting_nan(["flag_fairness"], [1, 0, 0, 0], [1, 2, 3, 4], [1, 0, 0, 1], ["a", "a", "b", "b"],
                                expect=["hit_rate/b"]).values
    assert np.isnan(v["hit_rate/b"]) and np.isnan(v["hit_rate_gap"])


def test_constant_scores_are_defined():
    with warnings.catch_warnings():
        warnings.simplefilter("error", MetricNaNWarning)
        v = evaluate(["detection", "score_fairness"], [1, 0, 1, 0], [2, 2, 2, 2], [1, 0, 1, 0], ["a", "a", "b", "b"]).values
    assert v["auroc"] == 0.5 and v["score_distance"] == 0.0 and v["score_ks"] == 0.0


def test_single_group_is_an_input_error():
    with pytest.raises(MetricInputError, match="single value"):
        evaluate(ALL, [0, 1], [0.1, 0.2], [0, 1], ["a", "a"])


def test_length_mismatch_is_an_input_error():
    with pytest.raises(MetricInputError, match=r"score has shape \(3,\); expected \(2,\)"):
        evaluate(ALL, [0, 1], [0.1, 0.2, 0.3], [0, 1], ["a", "b"])


def test_binned_bootstrap_agrees_with_exact_bootstrap(monkeypatch):
    # Large inputs resample pooled cells instead of rows; the intervals must
    # agree with the row-level bootstrap to a small share of their width.
    from evenflag.metrics import bootstrap

    from evenflag.metrics.inputs import FlagRule

    label, score, flag, group = _sample(n=30_000, seed=6)
    rule = FlagRule("top_fraction", 0.1)
    binned = evaluate(ALL, label, score, flag, group, n_bootstrap=200, seed=1, rule=rule).values
    monkeypatch.setattr(bootstrap, "EXACT_MAX_ROWS", 10**9)
    exact = evaluate(ALL, label, score, flag, group, n_bootstrap=200, seed=1, rule=rule).values
    for key in ("average_precision", "r_precision", "flag_f1", "flag_rate_diff/b", "false_flag_diff/b", "score_shift/b"):
        width = exact[f"{key}.ci_high"] - exact[f"{key}.ci_low"]
        for end in ("ci_low", "ci_high"):
            assert abs(binned[f"{key}.{end}"] - exact[f"{key}.{end}"]) < 0.3 * width, key


def test_equal_rates_do_not_name_a_group_against_itself():
    flag, group = _flags_from_counts({"a": (5, 50), "b": (5, 50)})
    notes = _evaluate_expecting_nan(["flag_fairness"], np.zeros(len(flag), int), None, flag, group).notes
    assert notes["flag_rate_ratio.pair"] == "all groups equal"


def test_score_distance_is_at_most_one_half_and_bounds_the_shift():
    # Fully separated groups of unequal size: every score of b above every score of a.
    score = np.r_[np.arange(70.0), 100 + np.arange(30.0)]
    group = np.array(["a"] * 70 + ["b"] * 30)
    v = _evaluate_expecting_nan(["score_fairness"], np.zeros(100, int), score, None, group).values
    assert v["score_distance"] == pytest.approx(0.5)
    rng = np.random.default_rng(4)
    for _ in range(20):  # |mean difference| <= Wasserstein-1 on the same pooled scale
        score, group = rng.normal(size=300), rng.choice(["a", "b", "c"], 300)
        v = _evaluate_expecting_nan(["score_fairness"], np.zeros(300, int), score + (group == "b"), None, group).values
        shifts = [value for key, value in v.items() if key.startswith("score_shift/") and "." not in key]
        assert len(shifts) == 2  # every group but the reference (the largest)
        assert all(abs(shift) <= v["score_distance"] + 1e-12 for shift in shifts)


def test_group_keys_stay_distinct_and_valid_mlflow_keys(tmp_path):
    """x|y and x-y once both became flag_rate/x-y. Each group keeps its own key,
    MLflow accepts every key (a real SQLite store; MLflow's documented key
    characters), and each value is the group's flag rate counted with numpy."""
    from mlflow.entities import Metric
    from mlflow.tracking import MlflowClient

    from evenflag.metrics.keys import group_from_key, group_key

    rng = np.random.default_rng(3)
    groups = np.array(["x|y", "x-y", "x.y", "Süd/Ost"])[rng.integers(0, 4, 2000)]
    flag = rng.random(2000) < 0.1
    label = (rng.random(2000) < 0.05).astype(int)
    values = evaluate(["flag_fairness"], label, rng.random(2000), flag, groups).values
    for name in ["x|y", "x-y", "x.y", "Süd/Ost"]:
        key = f"flag_rate/{group_key(name)}"
        assert values[key] == pytest.approx(flag[groups == name].mean(), abs=1e-12)
        assert group_from_key(key.split("/", 1)[1]) == name
    assert len({k for k in values if k.startswith("flag_rate/") and "." not in k.split("/", 1)[1]}) == 4
    client = MlflowClient(tracking_uri=f"sqlite:///{tmp_path / 'm.db'}")
    run = client.create_run(client.create_experiment("keys", artifact_location=(tmp_path / "artifacts").as_uri()))
    client.log_batch(run.info.run_id, metrics=[Metric(k, float(v), 0, 0) for k, v in values.items()
                                               if np.isfinite(v) and "/" in k])
    assert set(client.get_run(run.info.run_id).data.metrics) >= {f"flag_rate/{group_key(n)}" for n in ["x|y", "x-y"]}
