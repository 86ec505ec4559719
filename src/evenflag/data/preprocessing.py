"""Preprocessing fitted on training rows only.

Rules: numeric columns are standardised with the training mean and standard
deviation (a constant column is centred only); a missing number takes the
training median. Text, boolean and categorical columns are one-hot encoded
with the categories seen in training; a missing value is its own category
``(missing)``, and a category first seen at test time encodes as all zeros.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

MISSING = "(missing)"


def _is_numeric(series: pd.Series) -> bool:
    return pd.api.types.is_numeric_dtype(series) and not pd.api.types.is_bool_dtype(series)


@dataclass
class TabularEncoder:
    """Column-wise standardiser and one-hot encoder (scikit-learn style).

    Examples
    --------
    >>> import pandas as pd
    >>> train = pd.DataFrame({"amount": [1.0, 3.0], "channel": ["web", "post"]})
    >>> enc = TabularEncoder().fit(train)
    >>> enc.transform(pd.DataFrame({"amount": [2.0], "channel": ["phone"]})).tolist()
    [[0.0, 0.0, 0.0]]
    >>> enc.feature_names_
    ['amount', 'channel=post', 'channel=web']
    """

    numeric_: list[str] = field(default_factory=list)
    categorical_: dict[str, list[str]] = field(default_factory=dict)
    center_: np.ndarray | None = None
    scale_: np.ndarray | None = None
    fill_: np.ndarray | None = None
    feature_names_: list[str] = field(default_factory=list)

    def fit(self, frame: pd.DataFrame) -> "TabularEncoder":
        self.numeric_ = [c for c in frame.columns if _is_numeric(frame[c])]
        self.categorical_ = {}
        for column in frame.columns:
            if column in self.numeric_:
                continue
            values = self._as_category_text(frame[column])
            self.categorical_[column] = sorted(values.unique())
        numbers = frame[self.numeric_].to_numpy(dtype=np.float64) if self.numeric_ else np.empty((len(frame), 0))
        self.fill_ = np.nan_to_num(np.nanmedian(numbers, axis=0), nan=0.0) if numbers.size else np.zeros(0)
        numbers = np.where(np.isnan(numbers), self.fill_, numbers)
        self.center_ = numbers.mean(axis=0) if len(numbers) else np.zeros(len(self.numeric_))
        scale = numbers.std(axis=0) if len(numbers) else np.ones(len(self.numeric_))
        self.scale_ = np.where(scale > 1e-12, scale, 1.0)
        self.feature_names_ = list(self.numeric_) + [
            f"{column}={value}" for column, values in self.categorical_.items() for value in values
        ]
        return self

    @staticmethod
    def _as_category_text(series: pd.Series) -> pd.Series:
        return series.astype("string").fillna(MISSING).astype(object)

    def transform(self, frame: pd.DataFrame) -> np.ndarray:
        blocks = []
        if self.numeric_:
            numbers = frame[self.numeric_].to_numpy(dtype=np.float64)
            numbers = np.where(np.isnan(numbers), self.fill_, numbers)
            blocks.append((numbers - self.center_) / self.scale_)
        for column, values in self.categorical_.items():
            # -1 for a category first seen here: it encodes as all zeros.
            codes = pd.Index(values).get_indexer(self._as_category_text(frame[column]))
            onehot = np.zeros((len(frame), len(values)))
            seen = codes >= 0
            onehot[np.flatnonzero(seen), codes[seen]] = 1.0
            blocks.append(onehot)
        if not blocks:
            return np.zeros((len(frame), 0), dtype=np.float32)
        return np.hstack(blocks).astype(np.float32)


@dataclass
class PreparedData:
    """What a detector and the metrics need for one (dataset, protocol, seed)."""

    X_train: np.ndarray
    X_test: np.ndarray
    label_train: np.ndarray
    label_test: np.ndarray
    group_train: np.ndarray
    group_test: np.ndarray
    train_rows: np.ndarray
    test_rows: np.ndarray
    feature_names: list[str]


def prepare(dataset, split, group_as_feature: bool = False) -> PreparedData:
    """Fit the encoder on the training rows and encode both parts."""
    features = dataset.features
    if group_as_feature:
        features = pd.concat([features, dataset.protected.add_prefix("group:")], axis=1)
    train_frame = features.iloc[split.train]
    encoder = TabularEncoder().fit(train_frame)
    group = dataset.group.to_numpy().astype(str)
    return PreparedData(
        X_train=encoder.transform(train_frame),
        X_test=encoder.transform(features.iloc[split.test]),
        label_train=dataset.label[split.train],
        label_test=dataset.label[split.test],
        group_train=group[split.train],
        group_test=group[split.test],
        train_rows=split.train,
        test_rows=split.test,
        feature_names=encoder.feature_names_,
    )
