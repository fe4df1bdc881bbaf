"""Automatic axis description, the describe command and the annotation options of fit.

Data: an invented matrix whose truth is planted: a continuous latent variable drives
features f000–f009 (PC1) and a two-level annotation drives features f020–f029 (PC2).
References: numpy.corrcoef, scipy.stats.f_oneway (named beside each check).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy import stats as sps
from typer.testing import CliRunner

from axiscope import EngineSettings, fit
from axiscope.cli import app
from axiscope.explain.describe import describe, interpret_fit, plan_interpretation
from axiscope.io.readers import array_source

N, P = 120, 60
CAUSAL = ("cause", "driven", "due to", "because", "effect of", "determin", "leads to", "results in")


@pytest.fixture(scope="module")
def planted():
    rng = np.random.default_rng(42)
    level = rng.standard_normal(N)
    group = np.where(rng.random(N) < 0.5, "A", "B")
    X = rng.standard_normal((N, P))
    X[:, :10] += 3.0 * level[:, None]
    X[:, 20:30] += np.where(group == "B", 1.6, -1.6)[:, None]
    ann = pd.DataFrame({
        "sample_id": [f"s{i:03d}" for i in range(N)],
        "level": level,
        "run": group,
        "other": rng.choice(["p", "q", "r"], N),
        "noise": rng.standard_normal(N),
    })
    ids = ann.sample_id.to_numpy()
    fids = [f"f{j:03d}" for j in range(P)]
    return X, ids, fids, ann


def test_description_names_the_planted_drivers(planted):
    X, ids, fids, ann = planted
    r = fit(array_source(X, sample_ids=ids, feature_ids=fids), n_components=4,
            engine=EngineSettings(method="exact"))
    d = describe(r, annotations=ann, top=10)
    pc1 = d.features[d.features.axis == "PC1"]
    pc1_side = pc1[pc1.direction == ("positive" if pc1.correlation.abs().max() == pc1.correlation.max() else "negative")]
    assert set(pc1_side.feature_id) == {f"f{j:03d}" for j in range(10)}
    pc2 = d.features[d.features.axis == "PC2"]
    strongest = pc2.loc[pc2.correlation.abs().sort_values(ascending=False).index[:10]]
    assert set(strongest.feature_id) == {f"f{j:03d}" for j in range(20, 30)}
    assert (strongest.p_adjusted < 0.05).all()
    axes = d.axes.set_index("axis")
    assert axes.loc["PC1", "strongest_annotation"] == "level"
    assert axes.loc["PC2", "strongest_annotation"] == "run"
    s2 = axes.loc["PC2", "summary"]
    assert "separates run B" in s2 or "separates run A" in s2
    assert "level" in axes.loc["PC1", "summary"]
    assert not axes.batch_warning.any() and d.warnings == []
    for summary in d.axes.summary:
        assert not any(word in summary.lower() for word in CAUSAL), summary
    # the categories reported on PC2 carry test values beyond ±2 with opposite signs
    cats = d.categories[(d.categories.axis == "PC2") & (d.categories.variable == "run")]
    assert (cats.test_value.abs() >= 2).all() and np.sign(cats.test_value).sum() == 0
    assert "# PC2" in d.markdown["PC2"] and "run" in d.markdown["PC2"]


def test_batch_warning_fires_when_the_technical_column_drives_the_axis(planted):
    X, ids, fids, ann = planted
    r = fit(array_source(X, sample_ids=ids, feature_ids=fids), n_components=3,
            engine=EngineSettings(method="exact"))
    d = describe(r, annotations=ann, technical=["run"])
    axes = d.axes.set_index("axis")
    assert axes.loc["PC2", "batch_warning"] and not axes.loc["PC1", "batch_warning"]
    assert len(d.warnings) == 1 and "'run'" in d.warnings[0] and "batch effect" in d.warnings[0]
    assert "Warning" in d.markdown["PC2"]
    # a technical column that is not the strongest association on an axis raises nothing
    d2 = describe(r, annotations=ann, technical=["other", "noise"])
    assert not d2.axes.batch_warning.any()


def _write_inputs(tmp_path, planted, *, holdout=False):
    X, ids, fids, ann = planted
    np.save(tmp_path / "x.npy", X)
    (tmp_path / "ids.txt").write_text("\n".join(ids) + "\n")
    (tmp_path / "fids.txt").write_text("\n".join(fids) + "\n")
    ann = ann.copy()
    if holdout:
        ann["holdout"] = np.where(np.arange(N) % 6 == 0, "true", "false")
    ann.to_csv(tmp_path / "ann.tsv", sep="\t", index=False)
    return ["fit", str(tmp_path / "x.npy"), "--sample-ids", str(tmp_path / "ids.txt"),
            "--feature-ids", str(tmp_path / "fids.txt"), "-k", "3", "--method", "exact", "--quiet"]


def test_cli_fit_with_supplementary_samples_and_features_then_describe(tmp_path, planted):
    X, ids, fids, ann = planted
    base = _write_inputs(tmp_path, planted, holdout=True)
    (tmp_path / "sup.txt").write_text("f025\nf059\n")
    out = tmp_path / "res"
    runner = CliRunner()
    res = runner.invoke(app, base + ["--out", str(out), "--annotations", str(tmp_path / "ann.tsv"),
                                     "--technical", "run", "--supplementary-samples-column", "holdout",
                                     "--supplementary-features", str(tmp_path / "sup.txt")])
    assert res.exit_code == 0, res.output
    for name in ("sample_quality.tsv", "sample_contributions.tsv", "feature_statistics.tsv", "axis_description.tsv",
                 "annotation_categories.tsv", "axes/PC1.md", "axes/PC3.md", "supplementary_sample_scores.tsv"):
        assert (out / name).exists(), name
    top = pd.read_csv(out / "top_features.tsv", sep="\t")
    assert {"correlation", "contribution"} <= set(top.columns)
    quality = pd.read_csv(out / "sample_quality.tsv", sep="\t")
    assert (quality.status == "supplementary").sum() == 20 and (quality.status == "active").sum() == 100
    contrib = pd.read_csv(out / "sample_contributions.tsv", sep="\t")
    np.testing.assert_allclose(contrib.filter(like="contribution_").sum(), 100.0, rtol=1e-6)
    fstat = pd.read_csv(out / "feature_statistics.tsv", sep="\t")
    sup = fstat[fstat.status == "supplementary"].set_index("feature_id")
    assert set(sup.index) == {"f025", "f059"}
    scores = pd.read_csv(out / "sample_scores.tsv", sep="\t").set_index("sample_id")
    active_ids = scores.index.to_numpy()
    xi = np.array([list(ids).index(s) for s in active_ids])
    ref = np.corrcoef(X[xi, 25], scores[["PC1", "PC2", "PC3"]].to_numpy().T)[0, 1:]  # reference: numpy.corrcoef
    np.testing.assert_allclose(sup.loc["f025", ["correlation_PC1", "correlation_PC2", "correlation_PC3"]], ref, atol=1e-6)
    dropped = pd.read_csv(out / "dropped_features.tsv", sep="\t")
    assert set(dropped[dropped.reason == "supplementary"].feature_id) == {"f025", "f059"}
    desc = pd.read_csv(out / "axis_description.tsv", sep="\t").set_index("axis")
    assert desc.loc["PC2", "batch_warning"]
    assert res.output.count("batch effect") == 1  # logged once, not printed a second time

    # describe an existing result without refitting: same statistics
    res2 = runner.invoke(app, ["describe", str(out), "--annotations", str(tmp_path / "ann.tsv"),
                               "--ignore", "holdout", "--technical", "run", "-q"])
    assert res2.exit_code == 0, res2.output
    assert "holdout" not in set(pd.read_csv(out / "description" / "annotation_variables.tsv", sep="\t").variable)
    again = pd.read_csv(out / "description" / "annotation_qualitative.tsv", sep="\t")
    first = pd.read_csv(out / "annotation_qualitative.tsv", sep="\t")
    merged = first.merge(again, on=["variable", "axis"])
    assert len(merged) == len(first) > 0
    np.testing.assert_allclose(merged.correlation_ratio_x, merged.correlation_ratio_y, rtol=1e-6)
    # correlation ratio of 'run' on PC2 from the one-way ANOVA F of scipy.stats.f_oneway on
    # the active scores, through η² = F(G−1) / (F(G−1) + n − G) (one-way ANOVA identity)
    run = ann.set_index("sample_id").loc[active_ids, "run"].to_numpy()
    pc2 = scores["PC2"].to_numpy()
    ref = sps.f_oneway(pc2[run == "A"], pc2[run == "B"])  # reference: scipy.stats.f_oneway
    n_act, groups = pc2.shape[0], 2
    eta_ref = ref.statistic * (groups - 1) / (ref.statistic * (groups - 1) + n_act - groups)
    row = first[(first.variable == "run") & (first.axis == "PC2")].iloc[0]
    assert row.correlation_ratio == pytest.approx(eta_ref, rel=1e-5)
    assert row.p_value == pytest.approx(ref.pvalue, rel=1e-4, abs=1e-300)
    q1 = pd.read_csv(out / "sample_quality.tsv", sep="\t")
    q2 = pd.read_csv(out / "description" / "sample_quality.tsv", sep="\t")
    assert q1.filter(like="sq_cosine_").shape[1] == 3
    np.testing.assert_allclose(q1.filter(like="sq_cosine_"), q2.filter(like="sq_cosine_"), rtol=1e-6)
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["n_active_samples"] == 100


@pytest.mark.parametrize(
    "table, extra, message",
    [
        ("id_col", ["--id-column", "nope"], "no column 'nope'"),
        ("nonnumeric", ["--quantitative", "level"], "declared quantitative"),
        ("duplicates", [], "occur more than once"),
        ("unmatched", [], "have no row"),
    ],
)
def test_cli_bad_annotations_exit_2_and_write_nothing(tmp_path, planted, table, extra, message):
    base = _write_inputs(tmp_path, planted)
    ann = pd.read_csv(tmp_path / "ann.tsv", sep="\t", dtype=str)
    if table == "nonnumeric":
        ann.loc[5, "level"] = "high"
    elif table == "duplicates":
        ann.loc[7, "sample_id"] = ann.loc[8, "sample_id"]
    elif table == "unmatched":
        ann = ann.iloc[10:]
    ann.to_csv(tmp_path / "bad.tsv", sep="\t", index=False)
    out = tmp_path / "res"
    res = CliRunner().invoke(app, base + ["--out", str(out), "--annotations", str(tmp_path / "bad.tsv")] + extra)
    assert res.exit_code == 2
    assert message in res.output and "error:" in res.output
    assert "Traceback" not in res.output
    assert not out.exists()
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".res")]


def test_cli_single_level_category_is_reported_and_skipped(tmp_path, planted):
    base = _write_inputs(tmp_path, planted)
    ann = pd.read_csv(tmp_path / "ann.tsv", sep="\t")
    ann["site"] = "north"
    ann.to_csv(tmp_path / "ann.tsv", sep="\t", index=False)
    out = tmp_path / "res"
    res = CliRunner().invoke(app, base + ["--out", str(out), "--annotations", str(tmp_path / "ann.tsv")])
    assert res.exit_code == 0, res.output
    assert "'site'" in res.output and "single level" in res.output
    variables = pd.read_csv(out / "annotation_variables.tsv", sep="\t").set_index("variable")
    assert variables.loc["site", "status"].startswith("skipped")
    assert "site" not in set(pd.read_csv(out / "annotation_qualitative.tsv", sep="\t").variable)


def test_annotations_are_typed_on_the_active_samples_of_a_fit(caplog):
    # 40 samples, 8 supplementary: 'site' is "south" exactly on the 8 (one level among the
    # active samples) and 'depth' is empty only on them (no missing value among the active)
    rng = np.random.default_rng(5)
    X = rng.standard_normal((40, 12))
    ids = np.array([f"s{i:02d}" for i in range(40)], dtype=object)
    sup = np.arange(40) % 5 == 4
    table = pd.DataFrame({
        "sample_id": ids,
        "held": np.where(sup, "true", "false"),
        "site": np.where(sup, "south", "north"),
        "depth": [None if s else float(v) for s, v in zip(sup, rng.uniform(1, 2, 40))],
        "group": rng.choice(["a", "b"], 40),
    })
    src = array_source(X, sample_ids=ids)
    plan = plan_interpretation(src, annotations=table, supplementary_samples_column="held")
    assert plan.active is not None and (~plan.active).sum() == 8
    r = fit(src, n_components=2, active=plan.active, engine=EngineSettings(method="exact"))
    d = interpret_fit(plan, r, src, threads=1)
    var = d.variables.set_index("variable")
    assert "held" not in var.index
    assert var.loc["site", "n_levels"] == 1 and var.loc["site", "status"].startswith("skipped: a single level")
    assert var.loc["depth", "status"] == "used" and var.loc["depth", "n_used"] == 32
    assert var.loc["depth", "n_missing"] == 0
    assert set(d.quantitative.variable) == {"depth"} and set(d.qualitative.variable) == {"group"}
    assert (d.sample_quality.status == "supplementary").sum() == 8


def test_describe_command_on_a_garbled_scores_table(tmp_path, planted):
    base = _write_inputs(tmp_path, planted)
    out = tmp_path / "res"
    runner = CliRunner()
    assert runner.invoke(app, base + ["--out", str(out)]).exit_code == 0
    (out / "sample_scores.tsv").write_text("sample_id\tPC1\tPC2\tPC3\ns000\t1\t2\t3\n\x00\x01\t4\t5\t6\t7\t8\n")
    res = runner.invoke(app, ["describe", str(out), "-q"])
    assert res.exit_code == 2
    assert "Traceback" not in res.output
    lines = res.output.strip().splitlines()
    assert len(lines) == 1, res.output
    assert lines[0].startswith("error:") and "sample_scores.tsv" in lines[0] and "refit" in lines[0]
    assert not (out / "description").exists()
    # text in a score column is caught the same way
    (out / "sample_scores.tsv").write_text("sample_id\tPC1\tPC2\tPC3\ns000\t1\tabc\t3\n")
    res = runner.invoke(app, ["describe", str(out), "-q"])
    assert res.exit_code == 2 and "column PC2" in res.output and "Traceback" not in res.output


def test_describe_command_on_a_missing_directory(tmp_path):
    res = CliRunner().invoke(app, ["describe", str(tmp_path / "nothing"), "--out", str(tmp_path / "d")])
    assert res.exit_code == 2 and "no such result directory" in res.output
    assert not (tmp_path / "d").exists()
