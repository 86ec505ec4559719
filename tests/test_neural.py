"""Neural detectors: method details, detection quality, the adversary's effect, determinism."""

import numpy as np
import pytest
import torch

from evenflag.data.preprocessing import prepare
from evenflag.data.protocol import ProtocolSpec, make_split
from evenflag.data.registry import get_spec, load_dataset
from evenflag.detectors.conformance import assert_conforms
from evenflag.detectors.neural import (AdversarialDetector, AutoencoderDetector, DeepSVDDDetector, center_from_mean,
                                       radius_from_distances)
from evenflag.errors import DetectorError
from evenflag.metrics.suites import evaluate
from evenflag.thresholds import ThresholdSpec, flag_scores

SMALL = dict(hidden=[32], embedding_dim=8, epochs=15, batch_size=128)


def _synthetic(shift, rows=4000, seed=0, anomaly_distance=5.0):
    spec = get_spec("synthetic_claims")
    spec.source.shift = shift
    spec.source.rows = rows
    spec.source.anomaly_distance = anomaly_distance
    dataset = load_dataset(spec)
    return prepare(dataset, make_split(dataset, ProtocolSpec(), seed))


# ---------------------------------------------------------------- Deep SVDD details
def test_center_eps_rule():
    # Ruff et al. (2018), reference code: centre coordinates with |c_j| < eps become
    # -eps or +eps by their sign; an exact 0 goes to +eps.
    c = center_from_mean(torch.tensor([0.0, 0.05, -0.05, 0.5, -0.5, 0.1, -0.0999]), eps=0.1)
    assert c.tolist() == pytest.approx([0.1, 0.1, -0.1, 0.5, -0.5, 0.1, -0.1])
    assert (c.abs() >= 0.1 - 1e-7).all()


def test_fitted_center_keeps_every_coordinate_eps_away():
    data = _synthetic(1.0)
    det = DeepSVDDDetector(**SMALL, eps=0.3, seed=0).fit(data.X_train)
    assert (np.abs(det.center_) >= 0.3 - 1e-6).all()


def test_soft_boundary_radius_is_quantile_of_distances():
    data = _synthetic(1.0)
    det = DeepSVDDDetector(**SMALL, objective="soft_boundary", nu=0.2, warmup_epochs=2, seed=0).fit(data.X_train)
    sq = ((det.embed(data.X_train) - det.center_) ** 2).sum(axis=1)
    # The radius is the (1 - nu) quantile of distances, not of squared distances.
    assert det.radius_ == pytest.approx(float(np.quantile(np.sqrt(sq), 0.8)), rel=1e-5)
    assert radius_from_distances(np.array([1.0, 4.0, 9.0, 16.0]), nu=0.25) == pytest.approx(np.quantile([1, 2, 3, 4], 0.75))
    scores = det.anomaly_score(data.X_train)
    np.testing.assert_allclose(scores, sq - det.radius_ ** 2, rtol=1e-4, atol=1e-6)


def test_encoder_has_no_bias_parameters():
    det = DeepSVDDDetector(**SMALL).fit(_synthetic(0.5).X_train)
    names = [name for name, _ in det.encoder_.named_parameters()]
    assert names and not any("bias" in name for name in names)


# ---------------------------------------------------------------- quality and determinism
@pytest.mark.parametrize("make", [
    lambda: AutoencoderDetector(**SMALL, seed=0),
    lambda: DeepSVDDDetector(**SMALL, seed=0),
    lambda: DeepSVDDDetector(**SMALL, objective="soft_boundary", seed=0),
    lambda: AdversarialDetector(base={"name": "deep_svdd", **SMALL}, weight=1.0, seed=0),
], ids=["autoencoder", "deep_svdd", "deep_svdd_soft", "adversarial"])
def test_well_separated_data_is_detected(make):
    # Generated demo data with no group shift: anomalies lie 7 to 9 sd from the centre.
    data = _synthetic(0.0, anomaly_distance=8.0)
    det = make().fit(data.X_train, data.group_train)
    scores = det.anomaly_score(data.X_test)
    from sklearn.metrics import roc_auc_score  # reference library
    assert roc_auc_score(data.label_test, scores) > 0.95
    again = make().fit(data.X_train, data.group_train).anomaly_score(data.X_test)
    assert np.array_equal(scores, again)  # same seed, identical scores on CPU


@pytest.mark.parametrize("cls", [AutoencoderDetector, DeepSVDDDetector])
def test_neural_detectors_conform(cls):
    assert_conforms(cls, hidden=[16], embedding_dim=4, epochs=3)


def test_adversarial_conforms():
    assert_conforms(AdversarialDetector, base={"name": "deep_svdd", "hidden": [16], "embedding_dim": 4, "epochs": 3})


# ---------------------------------------------------------------- the adversary's effect
def test_adversary_lowers_leakage_and_raises_flag_rate_ratio():
    # Generated demo data with a strong group shift of normal rows; 3 seeds.
    # The margins (0.05 on each mean) are ours: common practice, no source.
    leak_base, leak_adv, ratio_base, ratio_adv = [], [], [], []
    for seed in (0, 1, 2):
        data = _synthetic(2.0, rows=8000, seed=seed)
        for weight, leak, ratio in ((0.0, leak_base, ratio_base), (3.0, leak_adv, ratio_adv)):
            det = AdversarialDetector(base={"name": "deep_svdd", "epochs": 30}, weight=weight, seed=seed)
            det.fit(data.X_train, data.group_train)
            scores = det.anomaly_score(data.X_test)
            flags = flag_scores(ThresholdSpec("top_fraction", 0.2), scores)
            values = evaluate(["flag_fairness", "leakage"], data.label_test, scores, flags, data.group_test,
                              embedding=det.embed(data.X_test), seed=seed).values
            leak.append(values["leakage_auroc"])
            ratio.append(values["flag_rate_ratio"])
    assert np.mean(leak_adv) < np.mean(leak_base) - 0.05, (leak_base, leak_adv)
    assert np.mean(ratio_adv) > np.mean(ratio_base) + 0.05, (ratio_base, ratio_adv)


def test_weight_zero_matches_the_base_detector():
    data = _synthetic(1.0)
    base = DeepSVDDDetector(**SMALL, seed=4).fit(data.X_train)
    adv = AdversarialDetector(base={"name": "deep_svdd", **SMALL}, weight=0.0, seed=4).fit(data.X_train, data.group_train)
    np.testing.assert_allclose(adv.anomaly_score(data.X_test), base.anomaly_score(data.X_test), rtol=1e-5, atol=1e-7)


@pytest.mark.parametrize("mode", ["alternating", "gradient_reversal"])
def test_multi_valued_and_intersectional_groups(mode):
    rng = np.random.default_rng(0)
    X = rng.normal(size=(600, 6)).astype(np.float32)
    sex = rng.choice(["female", "male"], 600)
    region = rng.choice(["north", "south", "east"], 600, p=[0.5, 0.3, 0.2])
    intersectional = np.char.add(np.char.add(sex, "|"), region)
    det = AdversarialDetector(base={"name": "autoencoder", "hidden": [16], "embedding_dim": 4, "epochs": 3},
                              weight=0.5, mode=mode, seed=0).fit(X, intersectional)
    values, counts = np.unique(intersectional, return_counts=True)
    assert len(values) == 6
    row = det.history_[-1]
    assert row["adversary_baseline"] == pytest.approx(counts.max() / 600)
    assert 0 <= row["adversary_accuracy"] <= 1 and np.isfinite(row["adversary_loss"])


@pytest.mark.parametrize("mode", ["alternating", "gradient_reversal"])
def test_adversary_trains_when_the_last_batch_has_one_row(mode):
    # 257 rows at batch size 128: the shuffled batches would end with a single row,
    # which batch statistics cannot normalise (torch.nn.BatchNorm1d refuses it).
    rng = np.random.default_rng(0)
    X = rng.normal(size=(257, 5)).astype(np.float32)
    group = rng.choice(["a", "b"], 257)
    det = AdversarialDetector(base={"name": "deep_svdd", "hidden": [8], "embedding_dim": 4, "epochs": 2, "batch_size": 128},
                              weight=1.0, mode=mode, seed=0).fit(X, group)
    assert np.isfinite(det.anomaly_score(X)).all()


def test_warmup_and_ramp_of_the_weight():
    data = _synthetic(1.0, rows=1000)
    det = AdversarialDetector(base={"name": "deep_svdd", **{**SMALL, "epochs": 6}}, weight=2.0, warmup_epochs=2,
                              ramp_epochs=2, seed=0).fit(data.X_train, data.group_train)
    assert [round(r["adversary_weight"], 6) for r in det.history_] == [0.0, 0.0, 1.0, 2.0, 2.0, 2.0]


# ---------------------------------------------------------------- failures
def test_non_finite_loss_stops_with_a_clear_reason():
    X = np.random.default_rng(0).normal(size=(300, 4)).astype(np.float32) * 1e30
    with pytest.raises(DetectorError, match="training loss became"):
        AutoencoderDetector(hidden=[8], embedding_dim=2, epochs=2).fit(X)


def test_collapsed_embedding_is_refused():
    data = _synthetic(1.0, rows=1000)
    det = DeepSVDDDetector(**SMALL).fit(data.X_train)
    with torch.no_grad():
        for p in det.encoder_.parameters():
            p.zero_()  # a bias-free network with zero weights maps every row to 0
    with pytest.raises(DetectorError, match="embedding collapsed"):
        det._check_collapse(torch.from_numpy(data.X_train))


def test_adversary_needs_groups():
    with pytest.raises(DetectorError, match="needs the group"):
        AdversarialDetector(base={"name": "deep_svdd", **SMALL}).fit(np.zeros((10, 3), dtype=np.float32))
