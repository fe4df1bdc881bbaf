"""Axis cards: the records, the pages, the explain command and the annotation options of fit.

Data: an invented matrix whose truth is planted: a continuous latent variable (annotation
``level``) drives features f000–f009 (PC1) and a two-level annotation (``run``) drives
features f020–f029 (PC2). References, named beside each check: scipy.stats.pearsonr,
scipy.stats.f_oneway, numpy.corrcoef, pandas.read_csv and Python's csv module (reading the
TSV back), Python's json module (strict JSON), and markdown-it-py, a CommonMark renderer with
the GitHub table extension (rendering the pages).
"""

from __future__ import annotations

import csv
import json
import re

import numpy as np
import pandas as pd
import pytest
from markdown_it import MarkdownIt
from scipy import stats as sps
from typer.testing import CliRunner

from axiscope import EngineSettings, fit
from axiscope.cli import app
from axiscope.errors import OptionError
from axiscope.explain.cards import explain_axes
from axiscope.explain.legend import COLUMNS, RECORD_COLUMNS, SECTIONS
from axiscope.explain.pages import format_p_value, markdown_text
from axiscope.explain.plan import explain_fit, plan_explanation
from axiscope.io import array_source

N, P = 120, 60
CAUSAL = ("cause", "driven", "drives", "due to", "because", "effect of", "determin", "leads to", "results in")
#: Ids that must not break any table.
WEIRD = ["pipe|id", "tab\tid", "new\nline", "carriage\rreturn", 'say "hi"', "<script>alert(1)</script>",
         "#hash", "back`tick*star_", "[link](x)", "amp&amp"]


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


@pytest.fixture(scope="module")
def planted_fit(planted):
    X, ids, fids, _ = planted
    return fit(array_source(X, sample_ids=ids, feature_ids=fids), n_components=3, engine=EngineSettings(method="exact"))


def read_cards(path) -> pd.DataFrame:
    """``axis_cards.tsv`` as pandas reads it, skipping the ``#`` lines before the header."""
    with open(path, encoding="utf-8", newline="") as handle:
        skip = 0
        for line in handle:
            if not line.startswith("#"):
                break
            skip += 1
    return pd.read_csv(path, sep="\t", skiprows=skip, dtype={c: str for c in ("feature_id", "sample_id", "annotation",
                                                                            "category", "text")})


def test_cards_find_the_planted_structure(planted, planted_fit):
    X, ids, fids, ann = planted
    cards = explain_axes(planted_fit, annotations=ann, top=10)
    pc1 = cards.built_from[(cards.built_from.axis == "PC1") & (cards.built_from.side == "positive")]
    assert set(pc1.feature_id) == {f"f{j:03d}" for j in range(10)}
    pc2 = cards.built_from[cards.built_from.axis == "PC2"]
    top_pc2 = pc2.loc[pc2.loading.abs().sort_values(ascending=False).index[:10]]
    assert set(top_pc2.feature_id) == {f"f{j:03d}" for j in range(20, 30)}
    assert (top_pc2.p_adjusted < 0.05).all()
    first = cards.lines_up.groupby("axis").head(1).set_index("axis")
    assert first.loc["PC1", "annotation"] == "level" and first.loc["PC2", "annotation"] == "run"
    # R² of the numeric annotation: squared Pearson correlation (reference: scipy.stats.pearsonr)
    ref = sps.pearsonr(ann.level, planted_fit.scores[:, 0])
    assert first.loc["PC1", "r_squared"] == pytest.approx(ref.statistic**2, rel=1e-10)
    assert first.loc["PC1", "p_value"] == pytest.approx(ref.pvalue, rel=1e-8, abs=1e-300)
    reading1, reading2 = cards.reading("PC1"), cards.reading("PC2")
    assert "scores rise with level" in reading1 or "scores fall with level" in reading1
    assert "run" in reading2 and ("B high, A low" in reading2 or "A high, B low" in reading2)
    assert cards.warnings == [] and (cards.readings.warning == "").all()
    for text in cards.readings.reading:
        assert not any(word in text.lower() for word in CAUSAL), text
    # the two categories of 'run' sit on opposite sides of PC2, far from the mean
    run = cards.categories[(cards.categories.axis == "PC2") & (cards.categories.annotation == "run")]
    assert (run.z.abs() > 5).all() and np.sign(run.z).sum() == 0
    assert cards.carries.above_noise.isna().all()  # the slot exists, not yet filled
    page = cards.pages["PC2"]
    for heading in ("## How much it carries", "## What it is built from", "## What it lines up with",
                    "## Samples at its ends", "## Samples it represents poorly", "## How to read this page"):
        assert heading in page
    assert "not assessed yet" in page


def test_batch_warning_only_when_a_technical_annotation_explains_most(planted, planted_fit):
    X, ids, fids, ann = planted
    cards = explain_axes(planted_fit, annotations=ann, technical=["run"])
    warned = cards.readings.set_index("axis").warning != ""
    assert list(warned[warned].index) == ["PC2"]
    assert len(cards.warnings) == 1 and "'run'" in cards.warnings[0] and "batch effect" in cards.warnings[0]
    assert "Possible batch effect" in cards.pages["PC2"] and "Possible batch effect" not in cards.pages["PC1"]
    records = cards.records()
    warning = records[records.section == "warning"]
    assert list(warning.axis) == ["PC2"] and list(warning.annotation) == ["run"]
    # a technical annotation that lines up with PC2 less than a biological one raises nothing:
    # 'lane' is 'run' with a fifth of the samples swapped (planted), so it explains less of PC2
    rng = np.random.default_rng(3)
    lane = np.where(rng.random(N) < 0.2, np.where(ann.run == "A", "B", "A"), ann.run)
    with_lane = ann.assign(lane=lane)
    quiet = explain_axes(planted_fit, annotations=with_lane, technical=["lane"])
    assert quiet.warnings == []
    shares = quiet.lines_up[quiet.lines_up.axis == "PC2"].set_index("annotation").r_squared
    assert shares["run"] > shares["lane"] > 0.1
    # ... and the same lane, now the only one marked biological is beaten by technical run
    loud = explain_axes(planted_fit, annotations=with_lane, technical=["run"])
    assert len(loud.warnings) == 1 and "'run'" in loud.warnings[0]


def test_whole_number_labels_are_categories_and_the_cards_say_so(planted, planted_fit):
    X, ids, fids, ann = planted
    digits = ann.assign(digit=np.arange(N) % 10)
    cards = explain_axes(planted_fit, annotations=digits)
    row = cards.lines_up[(cards.lines_up.axis == "PC1") & (cards.lines_up.annotation == "digit")].iloc[0]
    assert row.treated_as == "categorical" and row.df_between == 9
    # its R² is the between-category share (reference: scipy.stats.f_oneway, R² = F(g−1)/(F(g−1)+n−g))
    ref = sps.f_oneway(*(planted_fit.scores[digits.digit == d, 0] for d in range(10)))
    assert row.r_squared == pytest.approx(ref.statistic * 9 / (ref.statistic * 9 + N - 10), rel=1e-10)
    records = cards.records()
    use = records[(records.section == "annotation_use") & (records.annotation == "digit")].iloc[0]
    assert "taken for category codes" in use.text and "numeric" in use.text
    assert "taken for category codes" in cards.pages["PC1"]
    as_numbers = explain_axes(planted_fit, annotations=digits, numeric=["digit"])
    assert set(as_numbers.lines_up[as_numbers.lines_up.annotation == "digit"].treated_as) == {"numeric"}


def test_p_values_print_in_scientific_notation_and_never_as_zero(planted, planted_fit):
    assert format_p_value(0.0123) == "1.23e-02"
    assert format_p_value(1.0) == "1.00e+00"
    assert format_p_value(3.2e-250) == "3.20e-250"
    assert format_p_value(float("nan")) == "—" and format_p_value(None) == "—"
    # scipy's F upper tail underflows to exactly 0 for huge F (reference: scipy.stats.f.sf)
    underflow = float(sps.f.sf(1e12, 1, 10_000))
    assert underflow == 0.0 and format_p_value(underflow) == "< 1e-300"
    assert format_p_value(5e-324) == "< 1e-300"  # the smallest subnormal double
    # an annotation that is the scores themselves: R² = 1, p underflows, the page says so
    X, ids, fids, ann = planted
    copy = ann.assign(copy=2.0 * planted_fit.scores[:, 0] + 1.0)
    cards = explain_axes(planted_fit, annotations=copy)
    row = cards.lines_up[(cards.lines_up.axis == "PC1") & (cards.lines_up.annotation == "copy")].iloc[0]
    assert row.r_squared == pytest.approx(1.0, abs=1e-12) and row.p_value < 1e-300
    line = next(line for line in cards.pages["PC1"].splitlines() if line.startswith("| copy |"))
    cells = [cell.strip() for cell in line.strip().strip("|").split("|")]
    assert cells[-2:] == ["< 1e-300", "< 1e-300"]  # p-value and adjusted p
    assert "0.00e+00" not in cards.pages["PC1"]


def _weird_inputs():
    rng = np.random.default_rng(11)
    n, p = 40, len(WEIRD) + 6
    X = rng.standard_normal((n, p))
    X[:, :4] += 2.5 * rng.standard_normal(n)[:, None]
    sample_ids = [f"{WEIRD[i % len(WEIRD)]}-{i}" for i in range(n)]
    feature_ids = WEIRD + [f"g{j}" for j in range(p - len(WEIRD))]
    ann = pd.DataFrame({"sample_id": sample_ids,
                        "kind|of\tgroup": [WEIRD[i % 3] for i in range(n)],
                        "<b>dose</b>": rng.standard_normal(n)})
    return X, sample_ids, feature_ids, ann


def test_weird_ids_break_no_table(tmp_path):
    X, sample_ids, feature_ids, ann = _weird_inputs()
    r = fit(array_source(X, sample_ids=sample_ids, feature_ids=feature_ids), n_components=2, engine=EngineSettings(method="exact"))
    cards = explain_axes(r, annotations=ann, top=len(feature_ids), samples_per_list=len(sample_ids))
    cards.write(tmp_path, parquet=True)
    expected = cards.records()

    # TSV: every id comes back whole (references: pandas.read_csv, csv.reader)
    back = read_cards(tmp_path / "axis_cards.tsv")
    assert list(back.columns) == RECORD_COLUMNS and len(back) == len(expected)
    for column in ("feature_id", "sample_id", "annotation", "category"):
        assert back[column].fillna("").tolist() == expected[column].fillna("").tolist(), column
    assert set(back.feature_id.dropna()) == set(feature_ids)
    assert set(back.sample_id.dropna()) == set(sample_ids)
    with open(tmp_path / "axis_cards.tsv", encoding="utf-8", newline="") as handle:
        rows = [row for row in csv.reader(handle, delimiter="\t") if not row[0].startswith("#")]
    assert {len(row) for row in rows} == {len(RECORD_COLUMNS)}
    # pandas with comment="#" must not cut a quoted id holding '#'
    commented = pd.read_csv(tmp_path / "axis_cards.tsv", sep="\t", comment="#", dtype=str)
    assert set(commented.feature_id.dropna()) == set(feature_ids)
    assert set(pd.read_parquet(tmp_path / "axis_cards.parquet").sample_id.dropna()) == set(sample_ids)
    samples = pd.read_csv(tmp_path / "sample_statistics.tsv", sep="\t", dtype={"sample_id": str})
    assert samples.sample_id.tolist() == sample_ids

    # JSON: strict, the same records, and nothing that closes an HTML <script> element (reference: json)
    raw = (tmp_path / "axis_cards.json").read_text(encoding="utf-8")
    assert "<" not in raw and ">" not in raw and "NaN" not in raw
    data = json.loads(raw, parse_constant=lambda name: pytest.fail(f"bare {name} in JSON"))
    assert [rec["sample_id"] for rec in data["records"]] == [None if pd.isna(v) else v for v in expected.sample_id]
    assert set(data["columns"]) == set(RECORD_COLUMNS) and set(data["sections"]) == set(SECTIONS)

    # Markdown: rendered by a CommonMark + GitHub-tables renderer (reference: markdown-it-py),
    # every table keeps its columns, no id becomes markup, and every id is shown
    renderer = MarkdownIt("commonmark").enable("table")
    for axis, page in cards.pages.items():
        html = renderer.render(page)
        assert "<script>" not in html and "<b>" not in html and "<a " not in html
        for table in re.findall(r"<table>.*?</table>", html, flags=re.S):
            header = len(re.findall(r"<th>", table))
            body_rows = re.findall(r"<tr>(.*?)</tr>", table, flags=re.S)[1:]
            assert body_rows and all(len(re.findall(r"<td>", row)) == header for row in body_rows)
        for fid in feature_ids[:4]:
            assert markdown_text(fid) in page
    assert (tmp_path / "axis_cards" / "PC1.md").read_text(encoding="utf-8") == cards.pages["PC1"]


def test_markdown_text_escapes_markup_and_shows_control_characters():
    # CommonMark allows a backslash before any ASCII punctuation (CommonMark spec 0.31, §2.4);
    # control characters are shown as their Unicode control pictures (U+2400 block)
    assert markdown_text("a|b") == "a\\|b"
    assert markdown_text("<script>") == "&lt;script&gt;"
    assert markdown_text("x\ty\nz\r") == "x\u2409y\u240az\u240d"
    assert markdown_text("*_`[]#~!\\") == "\\*\\_\\`\\[\\]\\#\\~\\!\\\\"


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


def test_cli_fit_with_supplementary_elements_then_explain_again(tmp_path, planted):
    X, ids, fids, ann = planted
    base = _write_inputs(tmp_path, planted, holdout=True)
    (tmp_path / "sup.txt").write_text("f025\nf059\n")
    out = tmp_path / "res"
    runner = CliRunner()
    res = runner.invoke(app, base + ["--out", str(out), "--annotations", str(tmp_path / "ann.tsv"),
                                     "--technical", "run", "--supplementary-samples-column", "holdout",
                                     "--supplementary-features", str(tmp_path / "sup.txt"), "--format", "parquet"])
    assert res.exit_code == 0, res.output
    for name in ("axis_cards.tsv", "axis_cards.json", "axis_cards.parquet", "axis_cards/PC1.md", "axis_cards/PC3.md",
                 "sample_statistics.tsv", "sample_statistics.parquet", "feature_statistics.tsv",
                 "feature_statistics.parquet", "supplementary_sample_scores.tsv"):
        assert (out / name).exists(), name
    samples = pd.read_csv(out / "sample_statistics.tsv", sep="\t")
    assert samples.supplementary.sum() == 20 and (~samples.supplementary).sum() == 100
    np.testing.assert_allclose(samples[~samples.supplementary].filter(like="contribution_pct_").sum(), 100.0, rtol=1e-6)
    assert samples[samples.supplementary].filter(like="contribution_pct_").isna().all().all()
    features = pd.read_csv(out / "feature_statistics.tsv", sep="\t").set_index("feature_id")
    assert set(features[features.supplementary].index) == {"f025", "f059"}
    scores = pd.read_csv(out / "sample_scores.tsv", sep="\t").set_index("sample_id")
    active_ids = scores.index.to_numpy()
    xi = np.array([list(ids).index(s) for s in active_ids])
    ref = np.corrcoef(X[xi, 25], scores[["PC1", "PC2", "PC3"]].to_numpy().T)[0, 1:]  # reference: numpy.corrcoef
    np.testing.assert_allclose(features.loc["f025", ["correlation_PC1", "correlation_PC2", "correlation_PC3"]],
                               ref, atol=1e-6)
    cards = read_cards(out / "axis_cards.tsv")
    pc2 = cards[(cards.axis == "PC2") & (cards.section == "built_from")].set_index("feature_id")
    assert bool(pc2.loc["f025", "supplementary"]) and np.isnan(pc2.loc["f025", "contribution_pct"])
    assert list(cards[cards.section == "warning"].axis) == ["PC2"]
    assert res.output.count("batch effect") == 1  # logged once, not printed a second time
    # R² of 'run' on PC2 from the one-way ANOVA of scipy.stats.f_oneway on the active scores
    run = ann.set_index("sample_id").loc[active_ids, "run"].to_numpy()
    pc2_scores = scores["PC2"].to_numpy()
    anova = sps.f_oneway(pc2_scores[run == "A"], pc2_scores[run == "B"])
    n_act = pc2_scores.shape[0]
    row = cards[(cards.section == "lines_up") & (cards.axis == "PC2") & (cards.annotation == "run")].iloc[0]
    assert row.r_squared == pytest.approx(anova.statistic / (anova.statistic + n_act - 2), rel=1e-6)
    assert row.p_value == pytest.approx(anova.pvalue, rel=1e-5)
    # the JSON holds the same records as the TSV
    records = json.loads((out / "axis_cards.json").read_text())["records"]
    assert len(records) == len(cards)
    assert [r["r_squared"] for r in records if r["section"] == "lines_up"] == pytest.approx(
        cards[cards.section == "lines_up"].r_squared.tolist(), rel=1e-7)

    # explain again, later, without refitting: the same statistics
    res2 = runner.invoke(app, ["explain", str(out), "--annotations", str(tmp_path / "ann.tsv"),
                               "--ignore", "holdout", "--technical", "run", "-q"])
    assert res2.exit_code == 0, res2.output
    again = read_cards(out / "explanation" / "axis_cards.tsv")
    assert "holdout" not in set(again[again.section == "annotation_use"].annotation)
    first = cards[cards.section == "lines_up"].set_index(["axis", "annotation"]).r_squared
    second = again[again.section == "lines_up"].set_index(["axis", "annotation"]).r_squared
    np.testing.assert_allclose(second.loc[first.index], first, rtol=1e-6)
    s2 = pd.read_csv(out / "explanation" / "sample_statistics.tsv", sep="\t")
    np.testing.assert_allclose(s2.filter(like="sq_cosine_"), samples.filter(like="sq_cosine_"), rtol=1e-6)
    assert s2.supplementary.sum() == 20


def test_explaining_a_result_directory_equals_explaining_the_fit(tmp_path, planted, planted_fit):
    X, ids, fids, ann = planted
    planted_fit.write(tmp_path / "fit")
    from_disk = explain_axes(tmp_path / "fit", annotations=ann, technical=["run"])
    in_memory = explain_axes(planted_fit, annotations=ann, technical=["run"])
    a, b = from_disk.records(), in_memory.records()
    assert a.section.tolist() == b.section.tolist()
    # the directory holds the scores at 8 significant digits, hence the tolerance
    np.testing.assert_allclose(a.r_squared.to_numpy(float), b.r_squared.to_numpy(float), rtol=1e-6, atol=1e-9,
                               equal_nan=True)
    assert from_disk.warnings == in_memory.warnings


def test_every_record_column_has_a_meaning():
    assert set(COLUMNS) == set(RECORD_COLUMNS)


@pytest.mark.parametrize("kwargs, message", [({"top": 0}, "top=0"), ({"samples_per_list": 0}, "samples_per_list=0"),
                                             ({"alpha": 1.5}, "alpha=1.5"), ({"warn_share": -1}, "warn_share=-1")])
def test_settings_errors_name_the_python_parameter(planted_fit, kwargs, message):
    with pytest.raises(OptionError, match=re.escape(message)):
        explain_axes(planted_fit, **kwargs)


@pytest.mark.parametrize(
    "table, extra, message",
    [
        ("id_col", ["--id-column", "nope"], "no column 'nope'"),
        ("nonnumeric", ["--numeric", "level"], "declared numeric"),
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


def test_cli_single_category_column_is_reported_and_skipped(tmp_path, planted):
    base = _write_inputs(tmp_path, planted)
    ann = pd.read_csv(tmp_path / "ann.tsv", sep="\t")
    ann["site"] = "north"
    ann.to_csv(tmp_path / "ann.tsv", sep="\t", index=False)
    out = tmp_path / "res"
    res = CliRunner().invoke(app, base + ["--out", str(out), "--annotations", str(tmp_path / "ann.tsv")])
    assert res.exit_code == 0, res.output
    assert "'site'" in res.output and "single category" in res.output
    cards = read_cards(out / "axis_cards.tsv")
    use = cards[cards.section == "annotation_use"].set_index("annotation")
    assert not use.loc["site", "used"] and use.loc["site", "text"].startswith("skipped")
    assert "site" not in set(cards[cards.section == "lines_up"].annotation)


def test_annotations_are_treated_on_the_samples_that_built_the_axes():
    # 40 samples, 8 supplementary: 'site' is "south" exactly on the 8 (one category among
    # the others) and 'depth' is empty only on them (no missing value among the others)
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
    plan = plan_explanation(src, annotations=table, supplementary_samples_column="held")
    assert plan.active is not None and (~plan.active).sum() == 8
    r = fit(src, n_components=2, engine=EngineSettings(method="exact"), active=plan.active)
    cards = explain_fit(plan, r, src, threads=1, samples_per_list=40)
    use = cards.annotation_use.set_index("annotation")
    assert "held" not in use.index
    assert use.loc["site", "n_categories"] == 1 and use.loc["site", "note"].startswith("skipped: a single category")
    assert use.loc["depth", "used"] and use.loc["depth", "n_used"] == 32 and use.loc["depth", "n_missing"] == 0
    assert set(cards.lines_up.annotation) == {"depth", "group"}
    assert cards.sample_statistics.supplementary.sum() == 8
    # supplementary samples sit in the lists like the others, flagged
    for (axis, side), rows in cards.ends.groupby(["axis", "side"]):
        assert len(rows) == 40 and set(rows[rows.supplementary].sample_id) == set(ids[sup])
        assert rows[rows.supplementary].contribution_pct.isna().all()
    # their squared cosines add up to at most 1 over all axes of the full space
    assert (cards.sample_statistics.represented_share <= 1 + 1e-12).all()


def test_explain_command_on_a_garbled_scores_table(tmp_path, planted):
    base = _write_inputs(tmp_path, planted)
    out = tmp_path / "res"
    runner = CliRunner()
    assert runner.invoke(app, base + ["--out", str(out)]).exit_code == 0
    (out / "sample_scores.tsv").write_text("sample_id\tPC1\tPC2\tPC3\ns000\t1\t2\t3\n\x00\x01\t4\t5\t6\t7\t8\n")
    res = runner.invoke(app, ["explain", str(out), "-q"])
    assert res.exit_code == 2
    assert "Traceback" not in res.output
    lines = res.output.strip().splitlines()
    assert len(lines) == 1, res.output
    assert lines[0].startswith("error:") and "sample_scores.tsv" in lines[0] and "refit" in lines[0]
    assert not (out / "explanation").exists()
    # text in a score column is caught the same way
    (out / "sample_scores.tsv").write_text("sample_id\tPC1\tPC2\tPC3\ns000\t1\tabc\t3\n")
    res = runner.invoke(app, ["explain", str(out), "-q"])
    assert res.exit_code == 2 and "column PC2" in res.output and "Traceback" not in res.output


def test_explain_command_on_a_missing_directory(tmp_path):
    res = CliRunner().invoke(app, ["explain", str(tmp_path / "nothing"), "--out", str(tmp_path / "d")])
    assert res.exit_code == 2 and "no such result directory" in res.output
    assert not (tmp_path / "d").exists()


def test_the_explain_command_module_loads_no_numerical_library():
    # the command imports the library inside its function, so that --help stays fast
    import subprocess
    import sys

    code = (
        "import sys, types, importlib, axiscope\n"
        "pkg = types.ModuleType('axiscope.cli'); pkg.__path__ = [axiscope.__path__[0] + '/cli']\n"
        "sys.modules['axiscope.cli'] = pkg\n"
        "importlib.import_module('axiscope.cli.explain_cmd')\n"
        "print(','.join(m for m in ('numpy', 'pandas', 'scipy', 'dask') if m in sys.modules))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""
