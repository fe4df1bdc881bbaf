"""The built-in demo end to end: the axes it describes and the samples it flags.

The truth checked here was planted by the simulation (:mod:`axiscope.demo.cohort`): tissue
state drives the strongest structure, processing batch B shifts its own genes, and the
last six new samples are corrupted on purpose.
"""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd
from typer.testing import CliRunner

from axiscope.cli import app


def test_demo_describes_the_planted_structure_and_flags_corrupted_samples(tmp_path):
    out = tmp_path / "demo"
    result = CliRunner().invoke(app, ["demo", "--out", str(out), "--threads", "2", "--format", "parquet"])
    assert result.exit_code == 0, result.output

    cards = json.loads((out / "fit" / "axis_cards.json").read_text())["records"]
    first = {}
    for record in cards:  # the lines_up records come ranked by R² within each axis
        if record["section"] == "lines_up":
            first.setdefault(record["axis"], record["annotation"])
    warned = {record["axis"] for record in cards if record["section"] == "warning"}
    # planted truth: state is the strongest structure, batch B the next one (RNA quality,
    # also technical, has genes of its own and may lead a later axis)
    assert first["PC1"] == "state" and first["PC2"] == "state" and first["PC3"] == "batch"
    assert "PC3" in warned and not warned & {"PC1", "PC2"}
    assert "PC1" in result.output and "PC2" in result.output and "genes with the largest loadings" in result.output

    diagnostics = pd.read_csv(out / "score" / "diagnostics.tsv", sep="\t")
    truth = pd.read_csv(out / "data" / "new_batch_annotations.tsv", sep="\t")
    merged = diagnostics.merge(truth[["sample_id", "corrupted"]], on="sample_id")
    flagged = merged["flag"] != "within"
    # planted truth: every corrupted sample is flagged; clean ones mostly are not
    assert flagged[merged["corrupted"]].all()
    assert flagged[~merged["corrupted"]].mean() < 0.05  # at 0.99 confidence; common practice, no source
    assert "6 of the 6 deliberately corrupted" in result.output
    # planted truth: the two tissue-state axes and the batch axis are strong, so two halves of the
    # reference cohort give the same axes (split-half stability at least 0.8, the default threshold)
    stability = json.loads((out / "fit" / "manifest.json").read_text())["stability"]
    assert [a["stable"] for a in stability["axes"][:3]] == [True, True, True]
    assert (out / "fit" / "axis_stability.tsv").is_file() and "split-half stability" in result.output
    report = (out / "report.html").read_text()
    assert f"<dt>split-half stability</dt><dd>{stability['axes'][0]['stability']:.2f} (stable)</dd>" in report
    # --format parquet covers the tables of every stage
    for table in ("fit/sample_scores", "fit/top_features", "fit/axis_cards", "fit/sample_statistics",
                  "score/diagnostics", "score/scores"):
        tsv = pd.read_csv(out / f"{table}.tsv", sep="\t", comment="#" if "cards" in table else None)
        assert pd.read_parquet(out / f"{table}.parquet").shape == tsv.shape, table

    # the manifests record paths that exist after the run, not the temporary folder's
    for part in ("fit", "score"):
        strings = list(_strings(json.loads((out / part / "manifest.json").read_text())))
        assert not any(".tmp-" in value for value in strings), part
        paths = [value for value in strings if value.startswith(str(out))]
        assert paths, part
        assert all(Path(value).exists() for value in paths), paths
    assert json.loads((out / "fit" / "manifest.json").read_text())["input"]["path"] == str(
        out / "data" / "reference.zarr")
    # the axis cards name their annotation file where it now is, so a later report finds it
    recorded = json.loads((out / "fit" / "axis_cards.json").read_text())["settings"]["annotations"]
    assert Path(recorded).is_absolute() and Path(recorded).is_file()
    assert (out / "report.html").is_file() and (out / "fit" / "figures" / "samples_PC1_PC2.png").is_file()
    _check_groups(out, result.output)


def _check_groups(out: Path, output: str) -> None:
    """The demo's groups are the three planted tissue states, each led by its own marker genes."""
    from sklearn.metrics import adjusted_rand_score

    from axiscope.demo.cohort import STATES, simulate_cohort

    groups = pd.read_csv(out / "fit" / "groups" / "assignments.tsv", sep="\t", dtype={"sample_id": str})
    truth = pd.read_csv(out / "data" / "reference_annotations.tsv", sep="\t", dtype={"sample_id": str})
    merged = groups.merge(truth[["sample_id", "state"]], on="sample_id", validate="one_to_one")
    assert len(merged) == len(truth)
    # planted truth: three states; sklearn.metrics.adjusted_rand_score against them
    assert adjusted_rand_score(merged["state"], merged["group"]) >= 0.95
    # the same cohort as make_demo_data (1200 reference + 200 new samples, 6 corrupted, seed 7)
    cohort = simulate_cohort(1400, 6000, seed=7, n_corrupted=6)
    features = pd.read_csv(out / "fit" / "groups" / "group_features.tsv", sep="\t")
    for group, part in merged.groupby("group"):
        state = part["state"].mode().iloc[0]
        markers = set(cohort.gene_ids[cohort.truth["state_genes"][state]])
        assert state in STATES
        for side in ("above", "below"):  # the planted marker genes lead each side of the group's profile
            top = features[(features["group"] == group) & (features["side"] == side)]["feature_id"].head(10)
            assert len(top) == 10 and set(top) <= markers, (group, side)
    assert output.count("  Group ") == 3 and "mostly state = " in output


def _strings(record):
    """Every string in a JSON record."""
    if isinstance(record, dict):
        for value in record.values():
            yield from _strings(value)
    elif isinstance(record, list):
        for value in record:
            yield from _strings(value)
    elif isinstance(record, str):
        yield record
