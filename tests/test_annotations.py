"""Annotation reading, alignment and association statistics.

References: scipy.stats.pearsonr, scipy.stats.f_oneway, scipy.stats.false_discovery_control,
and the published test-value formula (Lebart, Morineau & Piron 1995) written out in the test.
Data: small invented tables.
"""

from __future__ import annotations

import logging
import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats as sps

from axiscope.errors import InputError, OptionError
from axiscope.explain.annotations import (
    category_statistics,
    correlation_ratio,
    correlation_test,
    load_annotations,
    qualitative_associations,
    quantitative_associations,
    read_annotations,
    sample_flags,
)
from axiscope.model.statistics import benjamini_hochberg


def test_correlation_and_p_value_match_pearsonr():
    rng = np.random.default_rng(0)
    F = rng.standard_normal((50, 3))
    x = F[:, 1] * 0.4 + rng.standard_normal(50)
    x[[3, 17, 40]] = np.nan
    r, p, n = correlation_test(x, F)
    ok = ~np.isnan(x)
    assert n == 47
    for a in range(3):
        ref = sps.pearsonr(x[ok], F[ok, a])  # reference: scipy.stats.pearsonr
        assert r[a] == pytest.approx(ref.statistic, abs=1e-12)
        assert p[a] == pytest.approx(ref.pvalue, rel=1e-9)


def test_correlation_ratio_matches_f_oneway():
    rng = np.random.default_rng(1)
    labels = np.array(["a"] * 7 + ["b"] * 12 + ["c"] * 5, dtype=object)
    y = rng.standard_normal(24) + np.where(labels == "b", 1.0, 0.0)
    ratio, f, p = correlation_ratio(y, labels)
    ref = sps.f_oneway(*(y[labels == g] for g in ("a", "b", "c")))  # reference: scipy.stats.f_oneway
    assert f == pytest.approx(ref.statistic, rel=1e-10)
    assert p == pytest.approx(ref.pvalue, rel=1e-9)
    # η² from F: η² = F(G−1) / (F(G−1) + n − G) (one-way ANOVA identity, common practice, no source)
    assert ratio == pytest.approx(ref.statistic * 2 / (ref.statistic * 2 + 21), rel=1e-10)


def test_benjamini_hochberg_matches_scipy():
    rng = np.random.default_rng(2)
    p = rng.uniform(0, 0.2, (40, 3)) ** 2
    ref = np.column_stack([sps.false_discovery_control(p[:, j]) for j in range(3)])  # reference: scipy.stats.false_discovery_control
    np.testing.assert_allclose(benjamini_hochberg(p, axis=0), ref, rtol=1e-12)
    with_nan = p[:, 0].copy()
    with_nan[[4, 9]] = np.nan
    out = benjamini_hochberg(with_nan)
    assert np.isnan(out[[4, 9]]).all()
    keep = ~np.isnan(with_nan)
    np.testing.assert_allclose(out[keep], sps.false_discovery_control(with_nan[keep]), rtol=1e-12)


def test_category_test_value_on_a_hand_checkable_table():
    # six samples with scores 1..6 on one axis; category "hi" = the last two
    scores = np.array([[1.0], [2.0], [3.0], [4.0], [5.0], [6.0]])
    labels = np.array(["lo", "lo", "lo", "lo", "hi", "hi"], dtype=object)
    table = category_statistics(labels, scores, ["PC1"], variable="g")
    hi = table[table.category == "hi"].iloc[0]
    # published formula (Lebart, Morineau & Piron 1995):
    #   v = (mean_g − mean) / sqrt((n − n_g)/(n − 1) · s²/n_g), s² the population variance
    n, n_g, mean, mean_g = 6, 2, 3.5, 5.5
    s2 = sum((v - mean) ** 2 for v in range(1, 7)) / n  # 17.5 / 6
    expected = (mean_g - mean) / math.sqrt((n - n_g) / (n - 1) * s2 / n_g)  # = 2 / sqrt(7/6) ≈ 1.8516
    assert hi.test_value == pytest.approx(expected, rel=1e-12)
    assert hi.mean_score == pytest.approx(5.5) and hi["count"] == 2
    lo = table[table.category == "lo"].iloc[0]
    assert lo.test_value == pytest.approx((2.5 - 3.5) / math.sqrt((6 - 4) / 5 * s2 / 4), rel=1e-12)


def _write(tmp_path, text, name="ann.tsv"):
    path = tmp_path / name
    path.write_text(text)
    return path


def test_typing_missing_values_and_skipped_columns(tmp_path, caplog):
    ids = [f"s{i}" for i in range(6)]
    text = "sample_id\tdepth\tgroup\tconst\tcode\tflag\n" + "".join(
        f"s{i}\t{'' if i == 2 else 10 + i}\t{'x' if i % 2 else 'y'}\tsame\t{i % 3}\t{'True' if i < 3 else 'False'}\n"
        for i in range(6)
    )
    path = _write(tmp_path, text)
    with caplog.at_level(logging.WARNING, logger="axiscope"):
        ann = load_annotations(path, ids[::-1], categorical="code", technical=["depth"])
    assert set(ann.quantitative) == {"depth"}
    assert set(ann.qualitative) == {"group", "code", "flag"}
    assert ann.technical == ["depth"]
    var = ann.variables.set_index("variable")
    assert var.loc["depth", "n_used"] == 5 and var.loc["depth", "n_missing"] == 1
    assert var.loc["const", "status"].startswith("skipped: a single level")
    assert "const" in caplog.text and "single level" in caplog.text
    # aligned by id, not by position
    assert list(ann.quantitative["depth"][:2]) == [15.0, 14.0]
    F = np.arange(12, dtype=float).reshape(6, 2)
    q = quantitative_associations(ann, F, ["PC1", "PC2"])
    assert (q.n == 5).all()
    ratios, cats = qualitative_associations(ann, F, ["PC1", "PC2"])
    assert set(ratios.variable) == {"group", "code", "flag"}
    assert set(cats[cats.variable == "flag"].category) == {"true", "false"}


def test_strict_alignment_reports_counts_and_examples(tmp_path, caplog):
    path = _write(tmp_path, "sample_id\tx\n" + "".join(f"s{i}\t{i}\n" for i in range(10)))
    ids = [f"s{i}" for i in range(3, 13)]
    with pytest.raises(InputError, match=r"3 of 10 samples have no row \(e.g. 's10', 's11', 's12'\).*"
                                         r"3 of 10 rows match no sample.*--allow-missing-annotations"):
        load_annotations(path, ids)
    with caplog.at_level(logging.WARNING, logger="axiscope"):
        ann = load_annotations(path, ids, allow_missing=True)
    assert "3 of 10 samples have no row" in caplog.text
    assert np.isnan(ann.quantitative["x"][-3:]).all()


@pytest.mark.parametrize(
    "text, kwargs, error, message",
    [
        ("id\tx\na\t1\nb\t2\n", {}, InputError, r"no column 'sample_id' \(columns: 'id', 'x'\).*--id-column"),
        ("sample_id\tx\na\t1\nb\t2\na\t3\n", {}, InputError, r"1 sample ids occur more than once.*'a'"),
        ("sample_id\tx\na\t1\nb\tlow\n", {"quantitative": "x"}, InputError,
         r"column 'x' is declared quantitative but sample 'b' has 'low'"),
        ("sample_id\tx\n" + "".join(f"s{i}\t{i}\n" for i in range(19)) + "s19\toops\n", {}, InputError,
         r"column 'x' is numeric except for 1 values.*--categorical x"),
        ("sample_id\tx\na\t1\nb\t2\n", {"technical": "batch"}, OptionError, r"--technical: no column 'batch'"),
    ],
    ids=["id-column", "duplicates", "declared-quantitative", "mostly-numeric", "unknown-technical"],
)
def test_bad_annotation_tables(tmp_path, text, kwargs, error, message):
    path = _write(tmp_path, text)
    ids = sorted({line.split("\t")[0] for line in text.splitlines()[1:]})
    with pytest.raises(error, match=message):
        load_annotations(path, ids, **kwargs)


def test_sample_flags(tmp_path):
    path = _write(tmp_path, "sample_id\thold\na\ttrue\nb\tFALSE\nc\t\nd\tyes\n")
    table = read_annotations(path)
    np.testing.assert_array_equal(sample_flags(table, "hold", ["d", "c", "b", "a"]), [True, False, False, True])
    bad = read_annotations(_write(tmp_path, "sample_id\thold\na\tmaybe\n", "bad.tsv"))
    with pytest.raises(InputError, match="must hold true/false"):
        sample_flags(bad, "hold", ["a"])


def test_dataframe_input_equals_file_input(tmp_path):
    df = pd.DataFrame({"sample_id": ["a", "b", "c", "d"], "x": [1.0, 2.0, np.nan, 4.0], "g": ["u", "v", "u", None]})
    path = tmp_path / "a.tsv"
    df.to_csv(path, sep="\t", index=False)
    one = load_annotations(df, ["a", "b", "c", "d"])
    two = load_annotations(path, ["a", "b", "c", "d"])
    np.testing.assert_array_equal(one.quantitative["x"], two.quantitative["x"])
    assert list(one.qualitative["g"]) == list(two.qualitative["g"]) == ["u", "v", "u", None]


def test_typing_and_counts_use_the_active_samples_only(caplog):
    # 40 samples, the last 8 supplementary: "site" is "south" exactly on them (one level
    # among the active samples) and "depth" is empty only on them (nothing missing)
    ids = [f"s{i:02d}" for i in range(40)]
    sup = np.arange(40) >= 32
    rng = np.random.default_rng(4)
    table = pd.DataFrame({
        "sample_id": ids,
        "site": np.where(sup, "south", "north"),
        "depth": [None if s else float(v) for s, v in zip(sup, rng.uniform(1, 2, 40))],
        "group": rng.choice(["a", "b"], 40),
    })
    with caplog.at_level(logging.WARNING, logger="axiscope"):
        ann = load_annotations(table, ids, active=~sup)
    var = ann.variables.set_index("variable")
    assert var.loc["site", "n_levels"] == 1 and var.loc["site", "status"].startswith("skipped: a single level")
    assert "site" not in ann.qualitative and "'site'" in caplog.text
    assert var.loc["depth", "n_used"] == 32 and var.loc["depth", "n_missing"] == 0
    assert var.loc["group", "n_used"] == 32
    assert list(ann.sample_ids) == ids[:32] and ann.quantitative["depth"].shape == (32,)
    # strict alignment still covers the supplementary samples
    with pytest.raises(InputError, match="8 of 40 samples have no row"):
        load_annotations(table.iloc[:32], ids, active=~sup)
