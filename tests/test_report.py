"""Reports from a store filled by a real sweep: numbers, failed cells, LaTeX, figures, statistics."""

import re

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from evenflag.report.stats import friedman_from_ranks, friedman_nemenyi, nemenyi_q, wilcoxon_pair
from tests.runner_helpers import REPO, client_for, evenflag, runs_of

CONFIGS = str(REPO / "tests" / "configs")


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    cwd = tmp_path_factory.mktemp("report")
    sweep = evenflag(cwd, "run", "-m", "--config-dir", CONFIGS, "dataset=synthetic_claims,german_credit",
                     "dataset.source.rows=800", "metrics=quick", "study=rep", "seed=0,1,2",
                     "detector=isolation_forest,covariance_distance,fails_on_odd_seed,always_fails")
    assert sweep.returncode == 1 and "16 done, 0 skipped (already finished), 8 failed" in sweep.stdout, sweep.stdout[-3000:]
    weights = evenflag(cwd, "run", "-m", "dataset=synthetic_claims", "dataset.source.rows=800", "metrics=quick",
                       "study=rep_weights", "seed=0,1", "detector=adversarial", "detector.weight=0,1",
                       "detector.base.epochs=2", "detector.base.hidden=[8]", "detector.base.rep_dim=4")
    assert weights.returncode == 0, weights.stdout[-3000:] + weights.stderr[-3000:]
    report = evenflag(cwd, "report", "--study", "rep", "--memo", "--html", "--out", str(cwd / "report"))
    assert report.returncode == 0, report.stderr
    tradeoff = evenflag(cwd, "report", "--study", "rep_weights", "--out", str(cwd / "report_weights"))
    assert tradeoff.returncode == 0, tradeoff.stderr
    return cwd, report.stdout


def test_table_numbers_equal_a_direct_computation(store):
    cwd, _ = store
    table = pd.read_csv(cwd / "report" / "table.csv")
    runs = [r for r in runs_of(client_for(cwd), "rep") if r.info.status == "FINISHED"]
    for dataset in ("german_credit", "synthetic_claims"):
        for detector in ("isolation_forest", "CovarianceDistanceDetector"):
            values = np.array([r.data.metrics["auroc"] for r in runs if r.data.params["dataset.name"] == dataset
                               and (r.data.params.get("detector.name") == detector
                                    or r.data.params.get("detector._target_", "").endswith(detector))])
            row = table[(table["dataset"] == dataset) & (table["detector"] == detector)].iloc[0]
            assert row["auroc.n"] == len(values) == 3
            assert row["auroc.mean"] == pytest.approx(values.mean(), rel=1e-5)
            # 95% interval half-width from the t distribution over seeds (scipy.stats.t).
            half = stats.t.ppf(0.975, 2) * values.std(ddof=1) / np.sqrt(3)
            assert row["auroc.ci"] == pytest.approx(half, rel=1e-4)


def test_failed_cells_are_shown_not_dropped(store):
    cwd, stdout = store
    markdown = (cwd / "report" / "table.md").read_text()
    always = next(line for line in markdown.splitlines() if "AlwaysFails" in line)
    assert "failed" in always and "| 0 (3) |" in always
    odd = next(line for line in markdown.splitlines() if "FailsOnOddSeed" in line)
    assert "| 2 (1) |" in odd
    assert "four-fifths rule is a rule of thumb" in markdown


def test_latex_is_a_tabular_with_the_right_column_count(store):
    cwd, _ = store
    tex = (cwd / "report" / "table.tex").read_text()
    spec = re.search(r"\\begin\{tabular\}\{([lrc]+)\}", tex).group(1)
    body = tex.split("\\toprule")[1].split("\\bottomrule")[0]
    rows = [line for line in body.splitlines() if line.strip().endswith("\\\\")]
    assert len(rows) == 1 + 8  # header + 2 datasets x 4 detectors
    for line in rows:
        assert len(re.split(r"(?<!\\)&", line)) == len(spec)
    caption = re.search(r"\\caption\{(.*)\}", tex).group(1)
    assert "rep" in caption and "0, 1, 2" in caption
    assert "\\midrule" in tex and tex.count("\\begin{table}") == 1


def test_figures_are_written(store):
    cwd, _ = store
    for name in ("flag_rates", "score_ecdf", "critical_difference"):
        png = cwd / "report" / f"{name}.png"
        assert png.stat().st_size > 5000 and png.read_bytes()[:4] == b"\x89PNG"
        assert "<svg" in (cwd / "report" / f"{name}.svg").read_text()[:2000]
    assert (cwd / "report_weights" / "tradeoff.png").stat().st_size > 5000


def test_memo_has_metadata_reading_figures_and_caution(store):
    cwd, _ = store
    memo = (cwd / "report" / "memo.md").read_text()
    runs = runs_of(client_for(cwd), "rep")
    for sha in {r.data.tags["evenflag.data_sha256"] for r in runs}:
        assert sha in memo
    assert "## Reading" in memo and "ranks anomalies best" in memo
    assert "four-fifths rule is a rule of thumb, not a legal finding" in memo
    assert "qualified counsel" in memo
    for image in re.findall(r"!\[.*\]\((.*)\)", memo):
        assert (cwd / "report" / image).exists()
    assert "<table>" in (cwd / "report" / "memo.html").read_text()


def test_unknown_study_is_one_line(store):
    cwd, _ = store
    result = evenflag(cwd, "report", "--study", "nope")
    assert result.returncode == 2 and len(result.stderr.strip().splitlines()) == 1
    assert "study 'nope' is not in the tracking store" in result.stderr and "rep" in result.stderr


# ---------------------------------------------------------------- statistics
def test_demsar_worked_example():
    # Demsar (2006), JMLR 7, section 3.2.2 worked example: k = 4 methods, N = 14 data
    # sets, mean ranks 3.143, 2.000, 2.893, 1.964 give chi2_F = 9.28, F_F = 3.69 and
    # CD = 1.25 at alpha 0.05 with q_0.05 = 2.569 (Table 5a).
    assert nemenyi_q(4) == pytest.approx(2.569, abs=5e-4)
    result = friedman_from_ranks([3.143, 2.000, 2.893, 1.964], 14)
    assert result.chi2_f == pytest.approx(9.28, abs=0.005)
    assert result.f_f == pytest.approx(3.69, abs=0.005)
    assert result.critical_difference == pytest.approx(1.25, abs=0.005)


def test_friedman_statistic_matches_scipy_without_ties():
    # Reference library: scipy.stats.friedmanchisquare (same statistic when there are no ties).
    rng = np.random.default_rng(0)
    scores = pd.DataFrame(rng.random((9, 4)), columns=list("abcd"))
    ours = friedman_nemenyi(scores, higher_is_better=True)
    reference = stats.friedmanchisquare(*[scores[c] for c in scores.columns])
    assert ours.chi2_f == pytest.approx(reference.statistic, rel=1e-10)


def test_wilcoxon_matches_scipy_on_the_same_pairs(store):
    cwd, _ = store
    from evenflag.report.collect import load_runs

    table = load_runs(f"sqlite:///{cwd / 'outputs' / 'tracking' / 'mlflow.db'}", ["rep"]).runs
    ours = wilcoxon_pair(table, "isolation_forest", "CovarianceDistanceDetector", "auroc")
    finished = table[table["status"] == "FINISHED"]
    a = finished[finished["detector"] == "isolation_forest"].sort_values(["dataset", "seed"])["auroc"].to_numpy()
    b = finished[finished["detector"] == "CovarianceDistanceDetector"].sort_values(["dataset", "seed"])["auroc"].to_numpy()
    reference = stats.wilcoxon(a, b)  # reference library: scipy.stats.wilcoxon
    assert ours["n"] == 6
    assert ours["p_value"] == pytest.approx(reference.pvalue) and ours["statistic"] == pytest.approx(reference.statistic)
