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


def test_subsampling_keeps_the_ratio_of_group_base_rates(adult):
    # Adult: 10.9% of women and 30.4% of men earn >50K (regression values counted in the
    # bundled UCI file; ratio 2.78). Cutting the anomaly rate to 5% must scale both
    # groups' rates by one factor (each group within one row), not keep the
    # anomalies' group mix (which moved the ratio to 3.4).
    spec = ProtocolSpec(kind="contaminated", test_anomaly_rate=0.05, train_anomaly_rate=0.05)
    split = make_split(adult, spec, seed=7)
    group = adult.group.to_numpy()
    natural = {v: adult.label[group == v].mean() for v in adult.group.cat.categories}
    for part in (split.test, split.train):
        assert abs(adult.label[part].mean() - 0.05) < 0.001
        factor = {v: adult.label[part][group[part] == v].mean() / natural[v] for v in natural}
        anomalies = {v: adult.label[part][group[part] == v].sum() for v in natural}
        rows = {v: (group[part] == v).sum() for v in natural}
        for v in natural:  # one row more or less moves the factor by at most this much
            tolerance = 1.0 / (rows[v] * natural[v])
            assert abs(factor[v] - factor["Male"]) <= tolerance + 1 / (rows["Male"] * natural["Male"]), factor
            assert anomalies[v] > 0
        # Normal rows are not subsampled below the natural rate: every normal row of the pool stays.
        normals = part[adult.label[part] == 0]
        for v in natural:
            pool = (adult.label == 0) & (group == v)
            assert abs((group[normals] == v).sum() - pool.sum() * len(normals) / (adult.label == 0).sum()) <= 1


def test_raising_the_anomaly_rate_thins_normal_rows_in_proportion(adult):
    spec = ProtocolSpec(kind="contaminated", test_anomaly_rate=0.4, train_anomaly_rate=0.3)
    split = make_split(adult, spec, seed=1)
    group = adult.group.to_numpy()
    natural = {v: adult.label[group == v].mean() for v in adult.group.cat.categories}
    rate = {v: adult.label[split.test][group[split.test] == v].mean() for v in natural}
    assert abs(adult.label[split.test].mean() - 0.4) < 0.002
    assert rate["Male"] / rate["Female"] == pytest.approx(natural["Male"] / natural["Female"], rel=0.01)


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


def test_datasets_show_prints_group_base_rates_before_and_after(tmp_path):
    import subprocess
    import sys

    result = subprocess.run([sys.executable, "-m", "evenflag.cli", "datasets", "show", "adult", "--protocol",
                             "contaminated"], capture_output=True, text=True, cwd=tmp_path, timeout=120)
    assert result.returncode == 0, result.stderr
    lines = {line.split()[0]: line.split() for line in result.stdout.splitlines() if line[:6] in ("Female", "Male  ")}
    # 10.9% of women and 30.4% of men earn >50K: regression values counted in the bundled UCI Adult file.
    assert lines["Female"][1] == "10.9%" and lines["Male"][1] == "30.4%"
    female, male = float(lines["Female"][3].rstrip("%")), float(lines["Male"][3].rstrip("%"))
    assert male / female == pytest.approx(30.4 / 10.9, rel=0.05)  # rounded to 0.1% in the output
