"""`evenflag audit`: exported scores judged with the benchmark's metric suites.

Every audit here writes to a real SQLite MLflow store under tmp_path and is
read back with MlflowClient or `evenflag report`.
"""

import math
import warnings

import numpy as np
import pandas as pd
import pytest

from evenflag.audit.compute import coarsen_scores, holm, ratio_change
from evenflag.cli import main


def _audit(tmp_path, monkeypatch, *args):
    monkeypatch.chdir(tmp_path)
    return main(["audit", *map(str, args)])


def _runs(tmp_path, study="audits"):
    from mlflow.tracking import MlflowClient

    client = MlflowClient(tracking_uri=f"sqlite:///{tmp_path / 'outputs' / 'tracking' / 'mlflow.db'}")
    experiment = client.get_experiment_by_name(study)
    return [] if experiment is None else client.search_runs([experiment.experiment_id])


def _claims(n=6000, seed=0, months=6):
    """Invented demo data: a benefit-claims review queue over half a year."""
    rng = np.random.default_rng(seed)
    region = rng.choice(["coast", "inland"], n, p=[0.7, 0.3])
    month = rng.integers(1, months + 1, n)
    score = rng.normal(size=n) + 0.25 * (region == "inland") * month / 3
    flagged = (score > np.quantile(score, 0.9)).astype(int)
    outcome = np.where(flagged == 1, np.where(rng.random(n) < 0.35, "fraud", "ok"), "")
    return pd.DataFrame({"case": np.arange(n), "risk": score, "region": region,
                         "month": [f"2026-{m:02d}" for m in month], "flagged": flagged, "outcome": outcome})


# ------------------------------------------------------------------ outside checks
def test_audit_of_rand_health_visits_matches_independent_flag_rates(tmp_path, monkeypatch):
    # Source: the RAND Health Insurance Experiment extract shipped with
    # statsmodels (statsmodels.datasets.randhie; its documentation states
    # 20,190 observations, mdvis = number of outpatient visits to an MD,
    # hlthg / hlthf / hlthp = 1 if self-rated health is good / fair / poor,
    # excellent when all three are 0). Scenario: a review that looks at the
    # 5% heaviest users of outpatient care, audited by self-rated health.
    sm_datasets = pytest.importorskip("statsmodels.datasets")
    data = sm_datasets.randhie.load_pandas().data
    assert len(data) == 20190  # the dataset's documented size
    health = np.select([data["hlthp"] == 1, data["hlthf"] == 1, data["hlthg"] == 1], ["poor", "fair", "good"],
                       "excellent")
    export = pd.DataFrame({"mdvis": data["mdvis"], "health": health})
    export.to_csv(tmp_path / "visits.csv", index=False)

    assert _audit(tmp_path, monkeypatch, tmp_path / "visits.csv", "score=mdvis", "group=[health]",
                  "threshold.fraction=0.05", "metrics.bootstrap=50") == 0

    # Independent computation with pandas: flag the top round(5% of n) visit
    # counts, rows tied with the last flagged count flagged too.
    k = int(round(0.05 * len(export)))
    cut = np.sort(export["mdvis"].to_numpy())[::-1][k - 1]
    expected = (export["mdvis"] >= cut).groupby(export["health"]).mean()
    assert len(expected) == 4
    (run,) = _runs(tmp_path)
    metrics = run.data.metrics
    for group, rate in expected.items():
        assert metrics[f"flag_rate/{group}"] == pytest.approx(rate, abs=1e-12)
    assert metrics["flag_rate_ratio"] == pytest.approx(expected.min() / expected.max(), abs=1e-12)
    assert run.data.tags["evenflag.kind"] == "audit"
    assert run.data.tags["evenflag.audit.rows"] == "20190"
    # Without labels, metrics that need outcomes are left out, not logged as NaN.
    assert not any(key.startswith(("auroc", "hit_rate", "false_flag")) for key in metrics)
    assert "needs the outcome" in run.data.tags["evenflag.skipped"] or "outcome" in run.data.tags["evenflag.skipped"]


def test_ratio_change_equals_the_interaction_wald_test_of_a_saturated_log_binomial_model():
    # Reference: statsmodels GLM, Binomial family with a log link, fitted on a
    # 2 x 2 table of group x period with the interaction term. In a saturated
    # model the interaction's estimate is the log ratio of the two periods'
    # flag-rate ratios and its Wald test is the one ratio_change computes.
    sm = pytest.importorskip("statsmodels.api")
    first, last = (30, 400, 50, 1200), (45, 380, 40, 1150)
    rows = []
    for period, (a, n, b, m) in enumerate((first, last)):
        rows += [(1, period, a, n - a), (0, period, b, m - b)]
    frame = pd.DataFrame(rows, columns=["group", "period", "flagged", "unflagged"])
    design = sm.add_constant(frame[["group", "period"]].assign(both=frame["group"] * frame["period"]))
    with warnings.catch_warnings():  # statsmodels warns that a log link can leave [0, 1]; a saturated fit does not
        warnings.simplefilter("ignore")
        fit = sm.GLM(frame[["flagged", "unflagged"]], design,
                     family=sm.families.Binomial(link=sm.families.links.Log())).fit(tol=1e-12)
    change, low, high, p = ratio_change(first, last)
    assert math.log(change) == pytest.approx(fit.params["both"], rel=1e-6)
    assert p == pytest.approx(fit.pvalues["both"], rel=1e-5)
    ci = fit.conf_int().loc["both"]
    assert (math.log(low), math.log(high)) == pytest.approx((ci[0], ci[1]), abs=1e-6)


def test_ratio_change_false_positive_rate_under_no_change():
    # Null: the same disparity in both periods; flags are the top 5% of each
    # period's scores. At the 5% level the test should reject about 5% of the
    # time (binomial 99.9% band for 1,000 simulations: 2.8% to 7.7%).
    rng = np.random.default_rng(7)
    rejected = tested = 0
    for _ in range(1000):
        tables = []
        for _ in range(2):
            inland = rng.random(3000) < 0.3
            score = rng.normal(size=3000) + 0.5 * inland
            flag = score >= np.sort(score)[-150]
            tables.append((int(flag[inland].sum()), int(inland.sum()), int(flag[~inland].sum()), int((~inland).sum())))
        p = ratio_change(*tables)[3]
        if np.isfinite(p):
            tested += 1
            rejected += p < 0.05
    assert tested >= 990
    assert 0.028 <= rejected / tested <= 0.077


def test_holm_matches_statsmodels():
    # Reference: statsmodels.stats.multitest.multipletests(method="holm").
    multitest = pytest.importorskip("statsmodels.stats.multitest")
    p = [0.01, 0.04, 0.03, 0.2]
    assert holm(p) == pytest.approx(list(multitest.multipletests(p, method="holm")[1]))


def test_flagged_only_outcomes_give_hit_rates_with_wilson_intervals(tmp_path, monkeypatch):
    # Reference for the interval: statsmodels proportion_confint(method="wilson").
    proportion = pytest.importorskip("statsmodels.stats.proportion")
    claims = _claims()
    claims.to_csv(tmp_path / "claims.csv", index=False)
    assert _audit(tmp_path, monkeypatch, tmp_path / "claims.csv", "score=risk", "group=[region]", "flag=flagged",
                  "label=outcome", "anomaly_values=[fraud]", "normal_values=[ok]", "metrics.bootstrap=0") == 0
    (run,) = _runs(tmp_path)
    metrics = run.data.metrics
    assert run.data.tags["evenflag.labels_known"] == "flagged_only"
    for region, rows in claims[claims["flagged"] == 1].groupby("region"):
        x, n = int((rows["outcome"] == "fraud").sum()), len(rows)
        assert metrics[f"precision/{region}"] == pytest.approx(x / n)
        low, high = proportion.proportion_confint(x, n, alpha=0.05, method="wilson")
        assert (metrics[f"precision/{region}.ci_low"], metrics[f"precision/{region}.ci_high"]) == pytest.approx((low, high))
    # Error rates need the outcomes of unflagged cases: refused, with the reason.
    assert not any(key.startswith(("hit_rate", "false_flag", "auroc", "base_rate")) for key in metrics)
    assert "flagged rows only" in run.data.tags["evenflag.skipped"]


def test_periods_give_per_period_rates_a_trend_figure_and_a_change_test(tmp_path, monkeypatch):
    claims = _claims(months=4)
    quarters = {"2026-01": "2026Q1", "2026-02": "2025Q4", "2026-03": "2026Q2", "2026-04": "2025Q3"}
    claims["quarter"] = claims["month"].map(quarters)
    claims.to_parquet(tmp_path / "claims.parquet", index=False)
    assert _audit(tmp_path, monkeypatch, tmp_path / "claims.parquet", "score=risk", "group=[region]", "flag=flagged",
                  "period=quarter", "out=" + str(tmp_path / "memo")) == 0
    periods = pd.read_csv(tmp_path / "memo" / "periods.csv")
    assert list(periods["period"]) == ["2025Q3", "2025Q4", "2026Q1", "2026Q2"]  # time order, not file order
    expected = claims.groupby(["quarter", "region"])["flagged"].mean()
    for _, row in periods.iterrows():
        for region in ("coast", "inland"):
            assert row[f"flag_rate/{region}"] == pytest.approx(expected[(row["period"], region)])
    assert (tmp_path / "memo" / "trend.png").stat().st_size > 10_000
    memo = (tmp_path / "memo" / "memo.md").read_text()
    assert "from 2025Q3 to 2026Q2" in memo and "four-fifths rule is a rule of thumb" in memo
    (run,) = _runs(tmp_path)
    first, last = (claims[claims["quarter"] == q] for q in ("2025Q3", "2026Q2"))

    def counts(part):
        return (int(part.loc[part.region == "inland", "flagged"].sum()), int((part.region == "inland").sum()),
                int(part.loc[part.region == "coast", "flagged"].sum()), int((part.region == "coast").sum()))

    assert run.data.metrics["ratio_change/inland"] == pytest.approx(ratio_change(counts(first), counts(last))[0])


def test_report_reads_audits_like_runs(tmp_path, monkeypatch, capsys):
    _claims().to_csv(tmp_path / "claims.csv", index=False)
    assert _audit(tmp_path, monkeypatch, tmp_path / "claims.csv", "score=risk", "group=[region]", "flag=flagged",
                  "metrics.bootstrap=0") == 0
    assert main(["report", "--study", "audits", "--memo", "--no-figures", "--out", str(tmp_path / "report")]) == 0
    memo = (tmp_path / "report" / "memo.md").read_text()
    assert "audited files" in memo and "claims.csv" in memo and "6,000 rows" in memo
    table = pd.read_csv(tmp_path / "report" / "table.csv")
    assert list(table["detector"]) == ["deployed"]


def test_the_same_file_is_not_audited_twice_and_a_moved_copy_is_the_same_audit(tmp_path, monkeypatch, capsys):
    _claims().to_csv(tmp_path / "claims.csv", index=False)
    settings = ["score=risk", "group=[region]", "flag=flagged", "metrics.bootstrap=0"]
    assert _audit(tmp_path, monkeypatch, tmp_path / "claims.csv", *settings) == 0
    (tmp_path / "claims.csv").rename(tmp_path / "moved.csv")
    assert _audit(tmp_path, monkeypatch, tmp_path / "moved.csv", *settings) == 0
    assert "audited before" in capsys.readouterr().out
    assert len(_runs(tmp_path)) == 1
    assert _audit(tmp_path, monkeypatch, tmp_path / "moved.csv", *settings, "threshold.fraction=0.1") == 0
    assert len(_runs(tmp_path)) == 2  # other settings: another audit


def test_streamed_reading_equals_reading_at_once(tmp_path, monkeypatch):
    # A Parquet file of several row groups read 1,000 rows at a time gives the
    # same numbers as one read (the path a file larger than memory takes).
    claims = _claims(n=5000)
    claims.to_parquet(tmp_path / "claims.parquet", index=False, row_group_size=700)
    from evenflag.audit.compute import compute_audit
    from evenflag.audit.spec import AuditSpec
    from evenflag.audit.table import read_audit_file
    from evenflag.metrics.suites import MetricsSpec
    from evenflag.thresholds import ThresholdSpec

    results = []
    for chunk_rows in (1000, 1_000_000):
        spec = AuditSpec(file=str(tmp_path / "claims.parquet"), score="risk", group=["region"], period="month",
                         id="case", chunk_rows=chunk_rows)
        results.append(compute_audit(read_audit_file(spec), ThresholdSpec(), MetricsSpec(bootstrap=20)).values)
    assert results[0] == results[1]


def test_weighted_flag_rates_equal_a_direct_computation(tmp_path, monkeypatch):
    claims = _claims().assign(weight=lambda f: np.random.default_rng(3).uniform(0.5, 2.0, len(f)))
    claims.to_csv(tmp_path / "claims.csv", index=False)
    assert _audit(tmp_path, monkeypatch, tmp_path / "claims.csv", "score=risk", "group=[region]", "flag=flagged",
                  "weight=weight", "metrics.bootstrap=0") == 0
    (run,) = _runs(tmp_path)
    weighted = (claims["weight"] * claims["flagged"]).groupby(claims["region"]).sum() / claims.groupby("region")["weight"].sum()
    for region, rate in weighted.items():
        assert run.data.metrics[f"weighted_flag_rate/{region}"] == pytest.approx(rate)
    assert run.data.metrics["weighted_flag_rate_ratio"] == pytest.approx(weighted.min() / weighted.max())


def test_coarsened_scores_keep_order_and_move_auroc_by_little():
    # Reference: scikit-learn roc_auc_score on the raw and the coarsened scores.
    from sklearn.metrics import roc_auc_score

    rng = np.random.default_rng(0)
    score = rng.normal(size=200_000)
    label = (rng.random(200_000) < 0.05 + 0.05 * (score > 1)).astype(int)
    coarse, levels = coarsen_scores(score, 1024)
    assert levels == 1024
    assert (np.diff(coarse[np.argsort(score)]) >= 0).all()  # the order never reverses
    assert abs(roc_auc_score(label, coarse) - roc_auc_score(label, score)) < 1 / 1024


# ------------------------------------------------------------------ bad input: one line each
def _bad_files(tmp_path):
    base = _claims(n=400)
    cases = {}

    def save(name, frame):
        frame.to_csv(tmp_path / f"{name}.csv", index=False)
        cases[name] = tmp_path / f"{name}.csv"

    save("score_text", base.assign(risk=base["risk"].astype(object).where(base.index != 3, "high")))
    save("score_nan", base.assign(risk=base["risk"].where(~base.index.isin([4, 9]), np.nan).where(base.index != 11, np.inf)))
    save("duplicate_ids", base.assign(case=base["case"].where(base.index != 8, 2)))
    save("one_group", base.assign(region="coast"))
    save("small_group", base.assign(region=base["region"].where(base.index >= 5, "island")))
    save("bad_period", base.assign(month=base["month"].where(base.index != 6, "sometime")))
    save("bad_label", base.assign(outcome=base["outcome"].where(base["flagged"].eq(0) | (base.index != base.index[base["flagged"].eq(1)][0]), "unsure")))
    (tmp_path / "empty.csv").write_bytes(b"")
    cases["empty"] = tmp_path / "empty.csv"
    base.iloc[:0].to_csv(tmp_path / "header_only.csv", index=False)
    cases["header_only"] = tmp_path / "header_only.csv"
    return cases


@pytest.mark.parametrize("case, words", [
    ("score_text", ["score column 'risk' is not numeric", "'high'", "data row 4"]),
    ("score_nan", ["3 empty, NaN or infinite", "data row 5"]),
    ("duplicate_ids", ["id column 'case'", "repeated", "data row 9"]),
    ("one_group", ["single value 'coast'"]),
    ("small_group", ["'island' has 5", "audit.min_group_size=30"]),
    ("bad_period", ["'sometime'", "not a date"]),
    ("bad_label", ["'unsure'", "audit.anomaly_values"]),
    ("empty", ["is empty"]),
    ("header_only", ["header but no rows"]),
    ("missing_column", ["score column 'riskiness' is not in", "set audit.score"]),
])
def test_bad_input_gives_one_line_and_no_run(tmp_path, monkeypatch, capsys, case, words):
    cases = _bad_files(tmp_path)
    file = cases.get(case, cases["score_text"])
    score = "riskiness" if case == "missing_column" else "risk"
    code = _audit(tmp_path, monkeypatch, file, f"score={score}", "group=[region]", "period=month", "flag=flagged",
                  "label=outcome", "anomaly_values=[fraud]", "normal_values=[ok]", "id=case")
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and err[0].startswith("evenflag: error: ")
    for word in words:
        assert word in err[0]
    assert _runs(tmp_path) == []  # nothing half-written in the store


def test_threshold_policies_that_cannot_apply_to_an_export_are_refused(tmp_path, monkeypatch, capsys):
    _claims().drop(columns="outcome").to_csv(tmp_path / "claims.csv", index=False)
    assert _audit(tmp_path, monkeypatch, tmp_path / "claims.csv", "score=risk", "group=[region]",
                  "threshold=train_quantile") == 2
    assert "held-out training rows" in capsys.readouterr().err


def test_out_never_replaces_a_folder_that_is_not_an_audit(tmp_path, monkeypatch, capsys):
    _claims().to_csv(tmp_path / "claims.csv", index=False)
    keep = tmp_path / "notes"
    keep.mkdir()
    (keep / "mine.txt").write_text("not an audit")
    settings = ["score=risk", "group=[region]", "flag=flagged", "metrics.bootstrap=0"]
    assert _audit(tmp_path, monkeypatch, tmp_path / "claims.csv", *settings, f"out={keep}") == 2
    assert "is not an earlier audit's folder" in capsys.readouterr().err
    assert (keep / "mine.txt").read_text() == "not an audit" and _runs(tmp_path) == []
    assert _audit(tmp_path, monkeypatch, tmp_path / "claims.csv", *settings, f"out={tmp_path}") == 2
    assert (tmp_path / "claims.csv").exists()
