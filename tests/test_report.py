"""Reports from a store filled by a real sweep: numbers, failed cells, LaTeX, figures, statistics."""

import re

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from evenflag.report.stats import (
    cd_diagram_reason,
    friedman_from_ranks,
    friedman_nemenyi,
    friedman_permutation_p,
    nemenyi_q,
    smallest_wilcoxon_p,
    wilcoxon_datasets,
)
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
                       "detector.base.epochs=2", "detector.base.hidden=[8]", "detector.base.embedding_dim=4")
    assert weights.returncode == 0, weights.stdout[-3000:] + weights.stderr[-3000:]
    report = evenflag(cwd, "report", "--study", "rep", "--memo", "--html", "--out", str(cwd / "report"))
    assert report.returncode == 0, report.stderr
    tradeoff = evenflag(cwd, "report", "--study", "rep_weights", "--out", str(cwd / "report_weights"))
    assert tradeoff.returncode == 0, tradeoff.stderr
    # Two configurations of one detector (protocol and threshold differ), then the
    # same cell and seed run again with rerun=true: a duplicate, not a new seed.
    cells = evenflag(cwd, "run", "-m", "dataset=synthetic_claims", "dataset.source.rows=800", "metrics=quick",
                     "study=cells", "seed=0,1", "protocol=one_class,contaminated", "threshold=top_fraction,true_rate")
    assert cells.returncode == 0, cells.stdout[-3000:] + cells.stderr[-3000:]
    again = evenflag(cwd, "run", "dataset=synthetic_claims", "dataset.source.rows=800", "metrics=quick",
                     "study=cells", "seed=0", "protocol=one_class", "threshold=top_fraction", "rerun=true")
    assert again.returncode == 0, again.stdout[-3000:] + again.stderr[-3000:]
    cell_report = evenflag(cwd, "report", "--study", "cells", "--memo", "--out", str(cwd / "report_cells"))
    assert cell_report.returncode == 0, cell_report.stderr
    return cwd, report.stdout


def test_table_numbers_equal_a_direct_computation(store):
    cwd, _ = store
    table = pd.read_csv(cwd / "report" / "table.csv")
    runs = [r for r in runs_of(client_for(cwd), "rep") if r.info.status == "FINISHED"]
    for dataset in ("german_credit", "synthetic_claims"):
        for detector in ("isolation_forest", "covariance_distance"):  # the config option chosen, tagged at run time
            values = np.array([r.data.metrics["auroc"] for r in runs if r.data.params["dataset.name"] == dataset
                               and r.data.tags["evenflag.detector"] == detector])
            row = table[(table["dataset"] == dataset) & (table["detector"] == detector)].iloc[0]
            assert row["auroc.n"] == len(values) == 3
            assert row["auroc.mean"] == pytest.approx(values.mean(), rel=1e-5)
            # 95% interval half-width from the t distribution over seeds (scipy.stats.t).
            half = stats.t.ppf(0.975, 2) * values.std(ddof=1) / np.sqrt(3)
            assert row["auroc.ci"] == pytest.approx(half, rel=1e-4)


def test_failed_cells_are_shown_not_dropped(store):
    cwd, stdout = store
    markdown = (cwd / "report" / "table.md").read_text()
    always = next(line for line in markdown.splitlines() if "always_fails" in line)
    assert "failed" in always and "| 0 (3) |" in always
    odd = next(line for line in markdown.splitlines() if "fails_on_odd_seed" in line)
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
    for name in ("flag_rates", "score_ecdf"):
        png = cwd / "report" / f"{name}.png"
        assert png.stat().st_size > 5000 and png.read_bytes()[:4] == b"\x89PNG"
        assert "<svg" in (cwd / "report" / f"{name}.svg").read_text()[:2000]
    # Two datasets cannot support a critical-difference diagram: with the 3 methods
    # that have results the exact Friedman p is at least 1/6, and the Nemenyi CD
    # (2.343 * sqrt(12 / 12) = 2.34, Demsar 2006) exceeds the largest rank gap (2).
    # The diagram is left out and the memo says why.
    memo = (cwd / "report" / "memo.md").read_text()
    assert not (cwd / "report" / "critical_difference.png").exists()
    assert "No critical-difference diagram:" in memo
    assert (cwd / "report_weights" / "tradeoff.png").stat().st_size > 5000


def test_memo_has_metadata_reading_figures_and_caution(store):
    cwd, _ = store
    memo = (cwd / "report" / "memo.md").read_text()
    runs = runs_of(client_for(cwd), "rep")
    for sha in {r.data.tags["evenflag.data_sha256"] for r in runs}:
        assert sha in memo
    assert "## Reading" in memo and "has the highest mean AUROC" in memo
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


def test_wilcoxon_over_datasets_matches_scipy():
    rng = np.random.default_rng(3)
    matrix = pd.DataFrame(rng.random((8, 3)), columns=["a", "b", "c"], index=[f"d{i}" for i in range(8)])
    ours = wilcoxon_datasets(matrix, "a", "b")
    reference = stats.wilcoxon(matrix["a"], matrix["b"])  # reference library: scipy.stats.wilcoxon
    assert ours["n"] == 8
    assert ours["p_value"] == pytest.approx(reference.pvalue) and ours["statistic"] == pytest.approx(reference.statistic)
    # The exact signed-rank test with n pairs cannot go below 2 / 2**n (all signs equal):
    # with 5 datasets that is 0.0625, so 0.05 is out of reach.
    assert smallest_wilcoxon_p(5) == pytest.approx(stats.wilcoxon([1, 2, 3, 4, 5], [0, 0, 0, 0, 0]).pvalue)


def _null_study(rng, n_datasets=10, seeds=5):
    """Runs of two methods with no difference on average over datasets: each
    dataset favours one method by its own amount (mean 0), seeds add noise."""
    rows = []
    for d in range(n_datasets):
        level, favour = rng.normal(0.7, 0.05), rng.normal(0, 0.02)
        for seed in range(seeds):
            for method, shift in (("plain", 0.0), ("variant", favour)):
                rows.append({"dataset": f"d{d}", "detector": method, "weight": np.nan, "settings": "",
                             "seed": seed, "status": "FINISHED", "error": "",
                             "auroc": level + shift + rng.normal(0, 0.005)})
    return pd.DataFrame(rows)


def test_wilcoxon_over_datasets_holds_its_false_positive_rate_under_the_null():
    # Simulation with a known truth (no difference between methods over datasets):
    # a valid 5% test rejects in about 5% of studies. Pairing every (dataset, seed)
    # treats seeds as independent evidence and rejects far more often.
    from evenflag.report.figures import method_matrix
    from evenflag.report.tables import aggregate

    rng = np.random.default_rng(11)
    ours = seedwise = 0
    studies = 400
    for _ in range(studies):
        runs = _null_study(rng)
        matrix = method_matrix(aggregate(runs, ["auroc"]), "auroc")
        ours += wilcoxon_datasets(matrix, "variant", "plain")["p_value"] < 0.05
        a = runs[runs["detector"] == "variant"].sort_values(["dataset", "seed"])["auroc"].to_numpy()
        b = runs[runs["detector"] == "plain"].sort_values(["dataset", "seed"])["auroc"].to_numpy()
        seedwise += stats.wilcoxon(a, b).pvalue < 0.05
    # 400 studies: a 5% test gives 20 +/- 9 rejections (binomial, 2 sd).
    assert ours / studies <= 0.075
    assert seedwise / studies >= 0.2


def test_friedman_exact_p_equals_enumeration():
    # Under no difference every ordering of each dataset's ranks is equally likely;
    # enumerate all of them and count statistics at least as large (definition of
    # the permutation test, e.g. Hollander and Wolfe, Nonparametric Statistical Methods).
    from itertools import permutations, product

    rng = np.random.default_rng(5)
    for n, k in ((2, 3), (3, 3), (3, 4), (4, 3)):
        values = np.round(rng.random((n, k)), 1)  # rounding makes ties
        ranks = np.vstack([stats.rankdata(-row) for row in values])
        observed = np.sum(ranks.sum(axis=0) ** 2)
        orders = [sorted(set(permutations(row.tolist()))) for row in ranks]
        hits = total = 0
        for choice in product(*[range(len(o)) for o in orders]):
            sums = np.sum([orders[i][c] for i, c in enumerate(choice)], axis=0)
            total += 1
            hits += np.sum(sums ** 2) >= observed - 1e-9
        p, method = friedman_permutation_p(ranks)
        assert method == "exact permutation"
        assert p == pytest.approx(hits / total, abs=1e-12)
    # Two datasets ranking three methods the same way: p = 1/6, not 0.
    perfect = friedman_nemenyi(pd.DataFrame([[0.9, 0.8, 0.7], [0.9, 0.8, 0.7]], columns=list("abc")))
    assert perfect.p_value == pytest.approx(1 / 6)
    assert np.isnan(perfect.f_f)
    assert "does not reject" in cd_diagram_reason(perfect)


def test_friedman_statistic_matches_scipy_with_ties():
    # Reference library: scipy.stats.friedmanchisquare, which applies the tie correction.
    rng = np.random.default_rng(2)
    scores = pd.DataFrame(np.round(rng.random((9, 4)), 1), columns=list("abcd"))
    ours = friedman_nemenyi(scores, higher_is_better=True)
    reference = stats.friedmanchisquare(*[scores[c] for c in scores.columns])
    assert ours.chi2_f == pytest.approx(reference.statistic, rel=1e-10)


def test_cells_never_pool_configurations_and_count_a_seed_once(store):
    cwd, _ = store
    table = pd.read_csv(cwd / "report_cells" / "table.csv").fillna({"settings": ""})
    # 2 protocols x 2 thresholds = 4 configurations of one detector, 2 seeds each;
    # the rerun of (one_class, top_fraction, seed 0) is counted once.
    assert len(table) == 4
    assert sorted(table["seeds"]) == ["0,1"] * 4
    assert (table["auroc.n"] == 2).all()
    assert table["settings"].str.contains("protocol.kind=").all()
    assert table["settings"].str.contains("threshold.policy=").all()
    assert table["settings"].nunique() == 4
    runs = [r for r in runs_of(client_for(cwd), "cells") if r.info.status == "FINISHED"]
    assert len(runs) == 9  # the store keeps the superseded run; the report counts it once


# ---------------------------------------------------------------- report inputs
def _one_error_line(result, *expected):
    lines = result.stderr.strip().splitlines()
    assert result.returncode == 2 and len(lines) == 1, result.stderr
    for text in expected:
        assert text in lines[0], lines[0]


def test_detector_has_one_name_and_report_inputs_are_checked(store):
    cwd, _ = store
    sweep = evenflag(cwd, "run", "-m", "dataset=synthetic_claims", "dataset.source.rows=800", "metrics=quick",
                     "study=names", "detector=local_outlier_factor,isolation_forest")
    assert sweep.returncode == 0, sweep.stdout[-2000:] + sweep.stderr[-2000:]
    assert "synthetic_claims local_outlier_factor seed=0" in sweep.stdout
    runs = runs_of(client_for(cwd), "names")
    assert sorted(r.data.tags["evenflag.detector"] for r in runs) == ["isolation_forest", "local_outlier_factor"]

    # The study's main report, then a filtered one: the filter goes to its own folder.
    main = evenflag(cwd, "report", "--study", "names")
    assert main.returncode == 0, main.stderr
    main_table = cwd / "outputs" / "reports" / "names" / "table.md"
    before = main_table.read_text()
    assert "local_outlier_factor" in before and "LocalOutlierFactor" not in before
    lof_id = next(r.info.run_id for r in runs if r.data.tags["evenflag.detector"] == "local_outlier_factor")
    subset = evenflag(cwd, "report", "--study", "names", "--where", "detector.name=local_outlier_factor",
                      "--run-id", lof_id[:8])
    assert subset.returncode == 0, subset.stderr
    assert main_table.read_text() == before
    (folder,) = (cwd / "outputs" / "reports" / "names").glob("subset-*")
    table = (folder / "table.md").read_text()
    assert "local_outlier_factor" in table and "isolation_forest" not in table
    assert (folder / "score_ecdf.png").exists()  # the 8-character id the runner prints picks the run

    _one_error_line(evenflag(cwd, "report", "--study", "names", "--where", "nosuchkey=1"),
                    "--where nosuchkey: no run", "has a param or tag of that name", "detector.name")
    _one_error_line(evenflag(cwd, "report", "--study", "names", "--metrics", "auroc,flag_rate_ration"),
                    "--metrics: no selected run has the key 'flag_rate_ration'", "flag_rate_ratio")
    _one_error_line(evenflag(cwd, "report", "--study", "names", "--run-id", "0123abcd"),
                    "--run-id 0123abcd: no selected run has that id")


def test_datasets_clear_refuses_an_unknown_name(tmp_path):
    _one_error_line(evenflag(tmp_path, "datasets", "clear", "nope"), "unknown dataset 'nope'; valid names: adult")


def test_datasets_show_takes_overrides_and_config_dir(tmp_path):
    shown = evenflag(tmp_path, "datasets", "show", "german_credit", "--config-dir", CONFIGS, "protocol.test_fraction=0.5")
    assert shown.returncode == 0, shown.stderr
    # german_credit has 1,000 rows (UCI Statlog German Credit documentation): half of them are test rows.
    assert "test 500 rows" in shown.stdout
    _one_error_line(evenflag(tmp_path, "datasets", "show", "german_credit", "protocol.test_fraction=2"),
                    "protocol.test_fraction must be between 0 and 1")


def test_tradeoff_labels_do_not_overlap():
    """Weights whose points nearly coincide get labels whose boxes do not overlap
    (boxes measured by matplotlib's own renderer); placed naively, they would."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from evenflag.report.figures import label_points

    x = np.array([0.900, 0.9005, 0.901, 0.9012, 0.95])
    y = np.array([0.800, 0.801, 0.8005, 0.802, 0.60])
    texts = [f"w={w:g}" for w in (0, 0.5, 1, 2, 5)]
    fig, ax = plt.subplots(figsize=(3.3, 3.1))
    ax.plot(x, y, "o")
    ax.set_ylim(0, 1.04)
    renderer = fig.canvas.get_renderer()
    naive = [ax.annotate(t, (a, b), textcoords="offset points", xytext=(4, 3), fontsize=7) for t, a, b in zip(texts, x, y)]
    from matplotlib.text import Text

    for note in naive:
        note.update_positions(renderer)
    boxes = [Text.get_window_extent(n, renderer) for n in naive]
    assert any(boxes[i].overlaps(boxes[j]) for i in range(5) for j in range(i))
    for note in naive:
        note.remove()
    placed = label_points(ax, x, y, texts)
    boxes = [Text.get_window_extent(n, renderer) for n in placed]  # the words, without leader lines
    assert not any(boxes[i].overlaps(boxes[j]) for i in range(5) for j in range(i))
    assert [n.get_text() for n in placed] == texts
    plt.close(fig)


def test_paired_seed_differences_match_scipy_paired_t_interval():
    # Reference: scipy.stats.ttest_rel(...).confidence_interval(), the 95%
    # t-interval of the mean paired difference.
    from evenflag.report.collect import RunTable
    from evenflag.report.memo import paired_seed_differences, paired_seed_lines

    rng = np.random.default_rng(4)
    rows = []
    for dataset in ("a", "b"):
        for seed in range(5):
            for detector in ("autoencoder", "fairod", "deep_svdd", "distribution_matching deep_svdd"):
                rows.append({"dataset": dataset, "detector": detector, "seed": seed, "status": "FINISHED",
                             "weight": np.nan, "settings": "", "leakage_auroc": rng.uniform(0.5, 0.9),
                             "flag_rate_ratio": rng.uniform(0.4, 1.0), "auroc": rng.uniform(0.5, 0.9)})
    runs = RunTable(runs=pd.DataFrame(rows), metric_columns=["leakage_auroc", "flag_rate_ratio", "auroc"], uri="",
                    studies=["x"])
    table = paired_seed_differences(runs)
    assert set(zip(table["variant"], table["base"])) == {("fairod", "autoencoder"),
                                                         ("distribution_matching deep_svdd", "deep_svdd")}
    frame = runs.runs
    for row in table.itertuples():
        part = frame[frame["dataset"] == row.dataset]
        a = part[part["detector"] == row.variant].sort_values("seed")[row.metric].to_numpy()
        b = part[part["detector"] == row.base].sort_values("seed")[row.metric].to_numpy()
        ci = stats.ttest_rel(a, b).confidence_interval(0.95)
        assert (row.low, row.high) == pytest.approx((ci.low, ci.high))
        assert row.difference == pytest.approx((a - b).mean())
    assert any("beyond seed noise" in line for line in paired_seed_lines(runs))


def test_paired_seed_interval_covers_the_true_difference():
    # Known truth: paired per-seed differences drawn around a true mean of
    # 0.05; the 95% t-interval should cover it in about 95% of 2,000 simulated
    # studies of 5 seeds (binomial 99.9% band: 93.4% to 96.4%).
    from evenflag.report.collect import RunTable
    from evenflag.report.memo import paired_seed_differences

    rng = np.random.default_rng(11)
    rows = []
    for study in range(2000):
        base = rng.normal(0.7, 0.05, 5)
        variant = base + 0.05 + rng.normal(0, 0.03, 5)
        for seed in range(5):
            for detector, value in (("deep_svdd", base[seed]), ("distribution_matching deep_svdd", variant[seed])):
                rows.append({"dataset": f"d{study}", "detector": detector, "seed": seed, "status": "FINISHED",
                             "weight": np.nan, "settings": "", "auroc": value})
    runs = RunTable(runs=pd.DataFrame(rows), metric_columns=["auroc"], uri="", studies=["x"])
    table = paired_seed_differences(runs, metrics=("auroc",))
    covered = ((table["low"] <= 0.05) & (table["high"] >= 0.05)).mean()
    assert len(table) == 2000 and 0.934 <= covered <= 0.964
