"""Experiments: does each fair-training variant remove group information?

For every variant and seed, on the held-out test rows of a dataset: AUROC, the
flag-rate ratio at the top 5%, and the strong-probe leakage AUROC (the larger
of a logistic and a gradient-boosted probe on out-of-fold predictions, as the
`leakage` metric family computes it), plus training seconds per epoch.
Prints mean and sd over seeds, and each variant minus the base.

Usage: .venv/bin/python scripts/fair_training_experiments.py [--dataset synthetic_claims] [--seeds 0 1 2]
       [--variants base adv_default ...] [--rows N]
"""

import argparse
import time

import numpy as np

from evenflag.data.preprocessing import prepare
from evenflag.data.protocol import ProtocolSpec, make_split
from evenflag.data.registry import get_spec, load_dataset
from evenflag.detectors.base import build_detector
from evenflag.metrics.suites import evaluate
from evenflag.thresholds import ThresholdSpec, flag_scores

BASE = {"name": "deep_svdd"}
VARIANTS = {
    "base": dict(BASE),
    # the adversary as shipped before these experiments: maximise its loss, one adversary
    "adv_maximise_w1": {"name": "adversarial", "adversary": "network", "weight": 1.0, "base": BASE},
    "adv_maximise_w3": {"name": "adversarial", "adversary": "network", "weight": 3.0, "base": BASE},
    "adv_maximise_steps5": {"name": "adversarial", "adversary": "network", "weight": 1.0, "adversary_steps": 5, "base": BASE},
    "adv_maximise_w10": {"name": "adversarial", "adversary": "network", "weight": 10.0, "base": BASE},
    "adv_reversal_w1": {"name": "adversarial", "adversary": "network", "weight": 1.0, "mode": "gradient_reversal", "base": BASE},
    "adv_confusion_w1": {"name": "adversarial", "adversary": "network", "weight": 1.0, "encoder_target": "confusion", "base": BASE},
    "adv_confusion_w3": {"name": "adversarial", "adversary": "network", "weight": 3.0, "encoder_target": "confusion", "base": BASE},
    "adv_confusion_3x_reinit": {"name": "adversarial", "adversary": "network", "weight": 1.0, "encoder_target": "confusion",
                                "n_adversaries": 3, "reinit_every": 5, "base": BASE},
    "adv_linear_steps5": {"name": "adversarial", "adversary": "network", "weight": 1.0, "adversary_hidden": [], "adversary_steps": 5,
                          "base": BASE},
    "adv_confusion_steps5": {"name": "adversarial", "adversary": "network", "weight": 1.0, "encoder_target": "confusion",
                             "adversary_steps": 5, "base": BASE},
    "adv_maximise_steps5_3x": {"name": "adversarial", "adversary": "network", "weight": 1.0, "adversary_steps": 5, "n_adversaries": 3,
                               "base": BASE},
    "adv_maximise_steps10": {"name": "adversarial", "adversary": "network", "weight": 1.0, "adversary_steps": 10, "base": BASE},
    "adv_reversal_w3": {"name": "adversarial", "adversary": "network", "weight": 3.0, "mode": "gradient_reversal", "base": BASE},
    "adv_reversal_w10": {"name": "adversarial", "adversary": "network", "weight": 10.0, "mode": "gradient_reversal", "base": BASE},
    "adv_reversal_linear_w3": {"name": "adversarial", "adversary": "network", "weight": 3.0, "mode": "gradient_reversal",
                               "adversary_hidden": [], "base": BASE},
    "adv_confusion_linear_steps5": {"name": "adversarial", "adversary": "network", "weight": 1.0, "encoder_target": "confusion",
                                    "adversary_hidden": [], "adversary_steps": 5, "base": BASE},
    "adv_confusion_linear_w10": {"name": "adversarial", "adversary": "network", "weight": 10.0, "encoder_target": "confusion",
                                 "adversary_hidden": [], "adversary_steps": 5, "base": BASE},
    "adv_conf_lin_refit100": {"name": "adversarial", "adversary": "network", "weight": 1.0, "encoder_target": "confusion",
                              "adversary_hidden": [], "adversary_steps": 1, "refit_steps": 100, "base": BASE},
    "adv_conf_mlp_refit100": {"name": "adversarial", "adversary": "network", "weight": 1.0, "encoder_target": "confusion",
                              "adversary_steps": 1, "refit_steps": 100, "base": BASE},
    "adv_max_mlp_refit100": {"name": "adversarial", "adversary": "network", "weight": 1.0, "adversary_steps": 1, "refit_steps": 100,
                             "base": BASE},
    "adv_max_lin_refit100": {"name": "adversarial", "adversary": "network", "weight": 1.0, "adversary_hidden": [], "adversary_steps": 1,
                             "refit_steps": 100, "base": BASE},
    "adv_conf_lin_fresh400": {"name": "adversarial", "adversary": "network", "weight": 1.0, "encoder_target": "confusion",
                              "adversary_hidden": [], "adversary_steps": 1, "refit_steps": 400, "reinit_every": 1,
                              "base": BASE},
    "adv_conf_mlp_fresh400": {"name": "adversarial", "adversary": "network", "weight": 1.0, "encoder_target": "confusion",
                              "adversary_steps": 1, "refit_steps": 400, "reinit_every": 1, "base": BASE},
    "adv_max_lin_fresh400": {"name": "adversarial", "adversary": "network", "weight": 1.0, "adversary_hidden": [], "adversary_steps": 1,
                             "refit_steps": 400, "reinit_every": 1, "base": BASE},
    "adv_conf_lin_fresh100_lr05": {"name": "adversarial", "adversary": "network", "weight": 1.0, "encoder_target": "confusion",
                                   "adversary_hidden": [], "adversary_steps": 1, "refit_steps": 100,
                                   "adversary_lr": 0.05, "reinit_every": 1, "base": BASE},
    "adv_conf_lin_fresh100_lr05_w3": {"name": "adversarial", "adversary": "network", "weight": 3.0, "encoder_target": "confusion",
                                      "adversary_hidden": [], "adversary_steps": 1, "refit_steps": 100,
                                      "adversary_lr": 0.05, "reinit_every": 1, "base": BASE},
    "adv_conf_mlp_fresh100_lr05_w03": {"name": "adversarial", "adversary": "network", "weight": 0.3, "encoder_target": "confusion",
                                       "adversary_steps": 1, "refit_steps": 100,
                                       "adversary_lr": 0.05, "reinit_every": 1, "base": BASE},
    "adv_conf_lin_fresh100_lr05_3x": {"name": "adversarial", "adversary": "network", "weight": 1.0, "encoder_target": "confusion",
                                      "adversary_hidden": [], "adversary_steps": 1, "refit_steps": 100,
                                      "n_adversaries": 3, "adversary_lr": 0.05, "reinit_every": 1, "base": BASE},
    # the closed-form adversary (the default): Fisher's discriminant on each batch, on the embedding
    # alone (linear) or with its squares (quadratic, the default)
    "fisherlin_w01": {"name": "adversarial", "adversary_features": "linear", "weight": 0.1, "base": BASE},
    "fisherlin_w03": {"name": "adversarial", "adversary_features": "linear", "weight": 0.3, "base": BASE},
    "fisherlin_w003": {"name": "adversarial", "adversary_features": "linear", "weight": 0.03, "base": BASE},
    "fisherlin_w1": {"name": "adversarial", "adversary_features": "linear", "weight": 1.0, "base": BASE},
    "fisher_w003": {"name": "adversarial", "weight": 0.03, "base": BASE},
    "fisher_w01": {"name": "adversarial", "weight": 0.1, "base": BASE},
    "fisher_w03": {"name": "adversarial", "weight": 0.3, "base": BASE},
    "fisher_w1": {"name": "adversarial", "weight": 1.0, "base": BASE},
    "fisher_w3": {"name": "adversarial", "weight": 3.0, "base": BASE},
    "fisher_w10": {"name": "adversarial", "weight": 10.0, "base": BASE},
    # the score-level term: Wasserstein-1 between the groups' batch scores, alone and with the MMD
    "score_w1": {"name": "distribution_matching", "weight": 0.0, "score_weight": 1.0, "base": BASE},
    "score_w3": {"name": "distribution_matching", "weight": 0.0, "score_weight": 3.0, "base": BASE},
    "score_w10": {"name": "distribution_matching", "weight": 0.0, "score_weight": 10.0, "base": BASE},
    "mmd_w3_score_w3": {"name": "distribution_matching", "weight": 3.0, "score_weight": 3.0, "base": BASE},
    "mmd_w1": {"name": "distribution_matching", "weight": 1.0, "base": BASE},
    "mmd_w3": {"name": "distribution_matching", "weight": 3.0, "base": BASE},
    "mmd_w10": {"name": "distribution_matching", "weight": 10.0, "base": BASE},
    "mmd_w100": {"name": "distribution_matching", "weight": 100.0, "base": BASE},
    # the autoencoder family: plain, FairOD, and the penalties on an autoencoder base
    "ae": {"name": "autoencoder"},
    "fairod": {"name": "fairod"},
    "fairod_w10": {"name": "fairod", "weight": 10.0},
    "ae_mmd_w10": {"name": "distribution_matching", "weight": 10.0, "base": {"name": "autoencoder"}},
}

# The plain detector each variant is compared with (default: Deep SVDD, "base").
BASE_OF = {"fairod": "ae", "fairod_w10": "ae", "ae_mmd_w10": "ae"}


def one(config, data, seed):
    detector = build_detector(config, seed=seed)
    start = time.perf_counter()
    detector.fit(data.X_train, data.group_train)
    seconds = time.perf_counter() - start
    epochs = len(getattr(detector, "history_", [])) or 1
    scores = detector.anomaly_score(data.X_test)
    flags = flag_scores(ThresholdSpec("top_fraction", 0.05), scores)
    values = evaluate(["detection", "flag_fairness", "score_fairness", "leakage"], data.label_test, scores, flags,
                      data.group_test, embedding=detector.embed(data.X_test), seed=seed).values
    return {"auroc": values["auroc"], "flag_rate_ratio": values["flag_rate_ratio"],
            "score_distance": values["score_distance"],
            "leakage": values["leakage_auroc"], "leak_linear": values["leakage_auroc/linear"],
            "leak_boosted": values["leakage_auroc/boosted"], "s_per_epoch": seconds / epochs}


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--dataset", default="synthetic_claims")
    parser.add_argument("--seeds", type=int, nargs="+", default=[0, 1, 2])
    parser.add_argument("--variants", nargs="+", default=list(VARIANTS))
    parser.add_argument("--rows", type=int, default=None, help="subsample the dataset's rows (synthetic: generate N)")
    args = parser.parse_args()
    spec = get_spec(args.dataset)
    if args.rows and spec.source.kind == "synthetic":
        spec.source.rows = args.rows
    dataset = load_dataset(spec)
    splits = {seed: prepare(dataset, make_split(dataset, ProtocolSpec(), seed)) for seed in args.seeds}
    results = {}
    for name in args.variants:
        rows = [one(VARIANTS[name], splits[seed], seed) for seed in args.seeds]
        results[name] = {k: np.array([r[k] for r in rows]) for k in rows[0]}
        r = results[name]
        print(f"{name:<26} " + "  ".join(f"{k} {v.mean():.3f}±{v.std(ddof=1) if len(v) > 1 else 0:.3f}"
                                        for k, v in r.items()), flush=True)
    print("\nminus its base, same seeds (leakage, score_distance: lower is better; flag_rate_ratio: higher is better; "
          "time/epoch: median over seeds against the base's median)")
    for name, r in results.items():
        base = BASE_OF.get(name, "base")
        if name in ("base", "ae") or base not in results:
            continue
        d = {k: r[k] - results[base][k] for k in ("auroc", "flag_rate_ratio", "score_distance", "leakage")}
        time_ratio = np.median(r["s_per_epoch"]) / np.median(results[base]["s_per_epoch"])
        print(f"{name:<26} vs {base:<5} " + "  ".join(
            f"{k} {v.mean():+.3f} (seeds {', '.join(f'{x:+.3f}' for x in v)})" for k, v in d.items())
            + f"  time/epoch x{time_ratio:.2f}")


if __name__ == "__main__":
    main()
