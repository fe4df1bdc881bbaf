"""Tables written by :func:`axiscope.io.output.write_table` read back cell for cell.

Readers used as the outside reference: pandas.read_csv and the standard library's csv module
(RFC 4180 quoting: a quoted cell may hold the separator, line breaks and doubled quotes).
"""

from __future__ import annotations

import csv
import json

import numpy as np
import pandas as pd
import pytest

from axiscope.io.output import write_json, write_table

AWKWARD = ["plain", "bar|pipe", "tab\there", "line\nbreak", "carriage\rreturn", 'quote"d',
           "<script>alert(1)</script>", "#hash", "gene#1", " padded "]


@pytest.mark.parametrize("ids", [AWKWARD, ["s1", "s2", "s3"]], ids=["awkward", "plain"])
def test_cells_survive_a_round_trip(tmp_path, ids):
    df = pd.DataFrame({"sample_id": ids, "PC1": np.linspace(-1.5, 2.25, len(ids)),
                       "flagged": [i % 2 == 0 for i in range(len(ids))]})
    path = tmp_path / "t.tsv"
    write_table(df, path, header=["a comment line"])
    back = pd.read_csv(path, sep="\t", comment=None, skiprows=1, dtype={"sample_id": str},
                       keep_default_na=False)
    assert back["sample_id"].tolist() == ids
    commented = pd.read_csv(path, sep="\t", comment="#", dtype={"sample_id": str}, keep_default_na=False)
    assert commented["sample_id"].tolist() == ids  # a quoted '#' is not a comment
    np.testing.assert_allclose(back["PC1"], df["PC1"], rtol=6e-8)  # 8 significant digits: ≤ 5e-8
    assert back["flagged"].tolist() == df["flagged"].tolist()  # written true/false, read as bool
    with path.open(newline="", encoding="utf-8") as handle:
        rows = list(csv.reader(handle, delimiter="\t"))
    assert rows[0] == ["# a comment line"]
    assert [r[0] for r in rows[2:]] == ids
    assert all(len(r) == 3 for r in rows[1:])


def test_json_is_strict(tmp_path):
    path = tmp_path / "m.json"
    write_json({"a": float("nan"), "b": [np.float64(np.inf), 1.5], "c": np.int64(3)}, path)
    text = path.read_text()
    assert json.loads(text, parse_constant=lambda c: pytest.fail(f"bare {c} in JSON")) == {
        "a": None, "b": [None, 1.5], "c": 3}
