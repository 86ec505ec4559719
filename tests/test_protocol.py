"""Protocol properties: disjoint splits, anomaly rates, group shares, seeding."""

import numpy as np
import pytest

from evenflag.data.preprocessing import TabularEncoder, prepare
from evenflag.data.protocol import ProtocolSpec, make_split
from evenflag.data.registry import load_dataset


@pytest.fixture(scope="module")
def adult():
    return load_dataset("adult")


@pytest.mark.parametrize("kind", ["one_class", "contaminated"])
def test_train_and_test_are_disjoint(adult, kind):
    split = make_split(adult, ProtocolSpec(kind=kind, test_anomaly_rate=0.05, train_anomaly_rate=0.02), seed=1)
    assert len(np.intersect1d(split.train, split.test)) == 0


def test_one_class_trains_on_normal_rows_only(adult):
    split = make_split(adult, ProtocolSpec(kind="one_class"), seed=0)
    assert adult.label[split.train].sum() == 0


@pytest.mark.parametrize("rate", [0.01, 0.05, 0.1])
def test_anomaly_rates_within_one_row(adult, rate):
    spec = ProtocolSpec(kind="contaminated", test_anomaly_rate=rate, train_anomaly_rate=rate / 2)
    split = make_split(adult, spec, seed=3)
    for rows, target in [(split.test, rate), (split.train, rate / 2)]:
        n_anomalies = adult.label[rows].sum()
        n_normal = len(rows) - n_anomalies
        expected = target / (1 - target) * n_normal
        assert abs(n_anomalies - expected) <= 1


def test_group_shares_preserved_within_one_row(adult):
    spec = ProtocolSpec(kind="contaminated", test_anomaly_rate=0.05, train_anomaly_rate=0.05)
    split = make_split(adult, spec, seed=7)
    group = adult.group.to_numpy()
    for part in (split.test, split.train):
        for lab in (0, 1):
            rows = part[adult.label[part] == lab]
            pool = adult.label == lab
            for value in adult.group.cat.categories:
                share_in_pool = (group[pool] == value).mean()
                assert abs((group[rows] == value).sum() - share_in_pool * len(rows)) <= 1


def test_stratified_test_fraction_per_stratum(adult):
    split = make_split(adult, ProtocolSpec(kind="one_class", test_fraction=0.3), seed=0)
    group = adult.group.to_numpy()
    for lab in (0, 1):
        for value in adult.group.cat.categories:
            stratum = (adult.label == lab) & (group == value)
            in_test = np.isin(np.flatnonzero(stratum), split.test).sum()
            assert abs(in_test - 0.3 * stratum.sum()) <= 1


def test_same_seed_same_split_other_seed_differs(adult):
    spec = ProtocolSpec(kind="contaminated", test_anomaly_rate=0.05, train_anomaly_rate=0.05)
    a, b, c = (make_split(adult, spec, seed=s) for s in (5, 5, 6))
    assert np.array_equal(a.train, b.train) and np.array_equal(a.test, b.test)
    assert not np.array_equal(a.test, c.test)


def test_preprocessing_fitted_on_train_only(adult):
    split = make_split(adult, ProtocolSpec(), seed=0)
    data = prepare(adult, split)
    numeric = [i for i, n in enumerate(data.feature_names) if "=" not in n]
    # Standardised on train: mean 0 and sd 1 on train rows, not on test rows.
    np.testing.assert_allclose(data.X_train[:, numeric].mean(axis=0), 0, atol=1e-4)
    np.testing.assert_allclose(data.X_train[:, numeric].std(axis=0), 1, atol=1e-3)
    assert np.abs(data.X_test[:, numeric].mean(axis=0)).max() > 1e-3
    assert not any(name.startswith("gender") for name in data.feature_names)
    assert np.isfinite(data.X_train).all() and np.isfinite(data.X_test).all()


def test_group_as_feature_adds_the_group_columns(adult):
    split = make_split(adult, ProtocolSpec(), seed=0)
    data = prepare(adult, split, group_as_feature=True)
    assert {"group:gender=Female", "group:gender=Male"} <= set(data.feature_names)


def test_encoder_matches_scikit_learn():
    # Reference library: scikit-learn's StandardScaler and OneHotEncoder give the
    # same numbers on a table without missing values.
    import pandas as pd
    from sklearn.preprocessing import OneHotEncoder, StandardScaler

    rng = np.random.default_rng(0)
    frame = pd.DataFrame({"a": rng.normal(size=50), "b": rng.choice(["x", "y", "z"], 50)})
    ours = TabularEncoder().fit(frame).transform(frame)
    scaled = StandardScaler().fit_transform(frame[["a"]])
    onehot = OneHotEncoder().fit_transform(frame[["b"]]).toarray()
    np.testing.assert_allclose(ours, np.hstack([scaled, onehot]), atol=1e-6)
