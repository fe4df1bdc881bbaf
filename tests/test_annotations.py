"""Annotation reading, alignment by sample id, and how each column is treated.

References: scipy.stats.false_discovery_control for the Benjamini–Hochberg adjustment; the
rest checks rules of this module on small invented tables (the integer-code rule is common
practice, no source).
"""

from __future__ import annotations

import logging

import numpy as np
import pandas as pd
import pytest
from scipy import stats as sps

from axiscope.errors import InputError, OptionError
from axiscope.explain.annotations import (
    MAX_CODE_CATEGORIES,
    load_annotations,
    read_annotations,
    sample_flags,
)
from axiscope.model.statistics import benjamini_hochberg


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


def _write(tmp_path, text, name="ann.tsv"):
    path = tmp_path / name
    path.write_text(text)
    return path


def test_treatment_missing_values_and_skipped_columns(tmp_path, caplog):
    ids = [f"s{i}" for i in range(6)]
    text = "sample_id\tdepth\tgroup\tconst\tcode\tflag\n" + "".join(
        f"s{i}\t{'' if i == 2 else 10 + i}\t{'x' if i % 2 else 'y'}\tsame\t{i % 3}\t{'True' if i < 3 else 'False'}\n"
        for i in range(6)
    )
    path = _write(tmp_path, text)
    with caplog.at_level(logging.WARNING, logger="axiscope"):
        ann = load_annotations(path, ids[::-1], categorical="code", technical=["depth"])
    assert set(ann.numeric) == {"depth"}
    assert set(ann.categorical) == {"group", "code", "flag"}
    assert ann.technical == ["depth"]
    use = ann.usage.set_index("annotation")
    assert use.loc["depth", "n_used"] == 5 and use.loc["depth", "n_missing"] == 1
    assert use.loc["depth", "technical"] and not use.loc["group", "technical"]
    assert not use.loc["const", "used"] and use.loc["const", "note"].startswith("skipped: a single category")
    assert "const" in caplog.text and "single category" in caplog.text
    # aligned by id, not by position
    assert list(ann.numeric["depth"][:2]) == [15.0, 14.0]
    assert sorted(set(ann.categorical["flag"])) == ["false", "true"]


@pytest.mark.parametrize("n_values", [2, 10, MAX_CODE_CATEGORIES])
def test_whole_numbers_with_few_values_are_category_codes(n_values, caplog):
    # class labels 0..n−1 repeated: a correlation with the label code would mean nothing
    n = 60
    labels = np.arange(n) % n_values
    table = pd.DataFrame({"sample_id": [f"s{i}" for i in range(n)], "label": labels,
                          "count": np.arange(n) * 7 + 3, "level": np.linspace(0, 1, n)})
    with caplog.at_level(logging.WARNING, logger="axiscope"):
        ann = load_annotations(table, table.sample_id)
    use = ann.usage.set_index("annotation")
    assert "label" in ann.categorical and use.loc["label", "treated_as"] == "categorical"
    assert use.loc["label", "n_categories"] == n_values
    assert f"{n_values} distinct values" in use.loc["label", "note"] and "numeric" in use.loc["label", "note"]
    assert "'label'" in caplog.text  # said on the console, not only in the files
    # many distinct whole numbers: numbers, and the note says how to treat them as codes
    assert "count" in ann.numeric and "categorical" in use.loc["count", "note"]
    assert "level" in ann.numeric and use.loc["level", "note"] == ""
    # the user's declaration wins
    declared = load_annotations(table, table.sample_id, numeric="label")
    assert "label" in declared.numeric and declared.usage.set_index("annotation").loc["label", "note"] == ""


def test_more_codes_than_the_limit_are_numbers_with_a_note():
    n = 100
    labels = np.arange(n) % (MAX_CODE_CATEGORIES + 1)
    table = pd.DataFrame({"sample_id": [f"s{i}" for i in range(n)], "label": labels})
    ann = load_annotations(table, table.sample_id)
    assert "label" in ann.numeric
    note = ann.usage.set_index("annotation").loc["label", "note"]
    assert f"{MAX_CODE_CATEGORIES + 1} distinct values" in note and "name 'label' in categorical" in note


def test_strict_alignment_reports_counts_and_examples(tmp_path, caplog):
    path = _write(tmp_path, "sample_id\tx\n" + "".join(f"s{i}\t{i}\n" for i in range(10)))
    ids = [f"s{i}" for i in range(3, 13)]
    with pytest.raises(InputError, match=r"3 of 10 samples have no row \(e.g. 's10', 's11', 's12'\).*"
                                         r"3 of 10 rows match no sample.*set allow_missing"):
        load_annotations(path, ids)
    with caplog.at_level(logging.WARNING, logger="axiscope"):
        ann = load_annotations(path, ids, allow_missing=True)
    assert "3 of 10 samples have no row" in caplog.text
    assert np.isnan(ann.numeric["x"][-3:]).all()


@pytest.mark.parametrize(
    "text, kwargs, error, message",
    [
        ("id\tx\na\t1\nb\t2\n", {}, InputError, r"no column 'sample_id' \(columns: 'id', 'x'\).*id_column"),
        ("sample_id\tx\na\t1\nb\t2\na\t3\n", {}, InputError, r"1 sample ids occur more than once.*'a'"),
        ("sample_id\tx\na\t1\nb\tlow\n", {"numeric": "x"}, InputError,
         r"column 'x' is declared numeric but sample 'b' has 'low'"),
        ("sample_id\tx\n" + "".join(f"s{i}\t{i}\n" for i in range(19)) + "s19\toops\n", {}, InputError,
         r"column 'x' is numeric except for 1 values.*name the column in categorical"),
        ("sample_id\tx\na\t1\nb\t2\n", {"technical": "batch"}, OptionError, r"technical=batch: no such column"),
    ],
    ids=["id-column", "duplicates", "declared-numeric", "mostly-numeric", "unknown-technical"],
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
    np.testing.assert_array_equal(one.numeric["x"], two.numeric["x"])
    assert list(one.categorical["g"]) == list(two.categorical["g"]) == ["u", "v", "u", None]


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
    use = ann.usage.set_index("annotation")
    assert use.loc["site", "n_categories"] == 1 and use.loc["site", "note"].startswith("skipped: a single category")
    assert "site" not in ann.categorical and "'site'" in caplog.text
    assert use.loc["depth", "n_used"] == 32 and use.loc["depth", "n_missing"] == 0
    assert use.loc["group", "n_used"] == 32
    assert list(ann.sample_ids) == ids[:32] and ann.numeric["depth"].shape == (32,)
    # strict alignment still covers the supplementary samples
    with pytest.raises(InputError, match="8 of 40 samples have no row"):
        load_annotations(table.iloc[:32], ids, active=~sup)
