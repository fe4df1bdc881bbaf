"""Groups of samples (``axiscope.decide.groups`` and ``axiscope groups``).

Every check names what it compares with: the planted truth of an invented matrix
(three groups, each raising five features and lowering five others), scikit-learn
(adjusted Rand index, k-means), scipy (Ward's linkage and its cut, the hypergeometric
distribution, Fisher's exact test), the definition of the hypergeometric upper tail
(sums of binomial coefficients), exact enumeration of draws without replacement, and
direct numpy computations on the dense matrix.
"""

from __future__ import annotations

import itertools
import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats as sps
from scipy.cluster.hierarchy import fcluster, linkage
from sklearn.metrics import adjusted_rand_score
from typer.testing import CliRunner

from axiscope.cli import app
from axiscope.decide.groups import (
    annotation_profiles,
    feature_group_sums,
    find_groups,
    group_samples,
    mean_z,
    ward_cuts,
)
from axiscope.errors import InputError, OptionError

N_PER_GROUP, P, MARKERS = 40, 60, 5


def _planted(seed: int = 3) -> tuple[np.ndarray, np.ndarray]:
    """Positive values (about 10 ± 1) where group g raises features 5g…5g+4 by 4 and lowers 30+5g…30+5g+4 by 4."""
    rng = np.random.default_rng(seed)
    truth = rng.permutation(np.repeat(np.arange(3), N_PER_GROUP))
    X = 10.0 + rng.standard_normal((truth.size, P))
    for g in range(3):
        X[np.ix_(truth == g, _up(g))] += 4.0
        X[np.ix_(truth == g, _down(g))] -= 4.0
    return X, truth


def _up(g: int) -> np.ndarray:
    return np.arange(MARKERS * g, MARKERS * (g + 1))


def _down(g: int) -> np.ndarray:
    return 30 + _up(g)


@pytest.fixture(scope="module")
def planted_fit(tmp_path_factory):
    """A fit (log(1 + x), standardized, 4 axes) of the planted matrix, saved as 'axiscope fit' does."""
    from axiscope import PreprocessSpec, Resources, fit

    folder = tmp_path_factory.mktemp("groups")
    X, truth = _planted()
    np.save(folder / "x.npy", X)
    result = fit(folder / "x.npy", n_components=4, preprocess=PreprocessSpec(log_transform=True),
                 resources=Resources(threads=1))
    result.write(folder / "fit")
    annotations = pd.DataFrame({"sample_id": result.sample_ids,
                                "tissue": np.array(["a", "b", "c"], dtype=object)[truth],
                                "age": np.random.default_rng(0).normal(50, 10, truth.size) + 5 * truth})
    annotations.to_csv(folder / "annotations.tsv", sep="\t", index=False)
    return folder, X, truth


def test_planted_groups_are_recovered_with_their_markers_on_top(planted_fit):
    folder, X, truth = planted_fit
    found = find_groups(folder / "fit", top=MARKERS, threads=1)
    assert found.n_groups == 3 and found.grouping.method == "ward"
    assert found.grouping.candidates["chosen"].sum() == 1
    # planted truth, scored by sklearn.metrics.adjusted_rand_score
    assert adjusted_rand_score(truth, found.labels) >= 0.95
    ids = np.array([f"feature_{j + 1:06d}" for j in range(P)])
    for group in range(1, 4):
        planted = np.bincount(truth[found.labels == group]).argmax()
        profile = found.features[found.features["group"] == group]
        assert set(profile[profile["side"] == "above"]["feature_id"]) == set(ids[_up(planted)])
        assert set(profile[profile["side"] == "below"]["feature_id"]) == set(ids[_down(planted)])
    # groups numbered by decreasing size; every sample in one group
    sizes = found.summary["n_samples"].to_numpy()
    assert list(sizes) == sorted(sizes, reverse=True) and sizes.sum() == truth.size
    assert found.manifest["passes"]["count"] == 1


def test_z_scores_and_summaries_match_a_direct_computation(planted_fit):
    folder, X, truth = planted_fit
    found = find_groups(folder / "fit", n_groups=3, top=8, samples_per_list=4, threads=1)
    Y = np.log1p(X)  # the fit's per-sample transform, replayed on the dense matrix
    n = Y.shape[0]
    mean, var = Y.mean(axis=0), Y.var(axis=0)
    for row in found.features.to_dict("records"):
        j = int(row["feature_id"].split("_")[1]) - 1
        member = found.labels == row["group"]
        n_g = member.sum()
        group_mean = Y[member, j].mean()
        z = (group_mean - mean[j]) / np.sqrt(var[j] / n_g * (n - n_g) / (n - 1))  # Cochran 1977, Thm 2.2
        assert row["group_mean"] == pytest.approx(group_mean, rel=1e-12)
        assert row["overall_mean"] == pytest.approx(mean[j], rel=1e-12)
        assert row["group_sd"] == pytest.approx(Y[member, j].std(), rel=1e-9)
        assert row["z"] == pytest.approx(z, rel=1e-9)
        assert row["p_value"] == pytest.approx(2 * sps.norm.sf(abs(z)), rel=1e-6)  # scipy.stats.norm
    # the centres, nearest and farthest samples against numpy on the scores
    scores = pd.read_csv(folder / "fit" / "sample_scores.tsv", sep="\t")[found.axis_names].to_numpy()
    for group in range(1, 4):
        member = np.flatnonzero(found.labels == group)
        centre = scores[member].mean(axis=0)
        got = found.summary.loc[found.summary["group"] == group, [f"centre_{a}" for a in found.axis_names]]
        np.testing.assert_allclose(got.to_numpy()[0], centre, rtol=1e-10, atol=1e-12)
        distance = np.linalg.norm(scores[member] - centre, axis=1)
        listed = found.members[found.members["group"] == group]
        nearest = listed[listed["position"] == "nearest"]["sample_id"].tolist()
        farthest = listed[listed["position"] == "farthest"]["sample_id"].tolist()
        assert nearest == list(found.sample_ids[member[np.argsort(distance, kind="stable")[:4]]])
        assert farthest == list(found.sample_ids[member[np.argsort(-distance, kind="stable")[:4]]])


def test_z_of_a_mean_drawn_without_replacement_has_the_enumerated_variance():
    # exact enumeration of every 3-of-8 draw: the variance of their means is σ²/n_g·(n − n_g)/(n − 1)
    values = np.array([1.0, 4.0, 2.5, 7.0, 3.0, 9.5, 0.5, 6.0])
    means = np.array([values[list(c)].mean() for c in itertools.combinations(range(8), 3)])
    z = mean_z(means.max(), 3, values.mean(), values.var(), 8)
    assert z == pytest.approx((means.max() - means.mean()) / means.std(), rel=1e-12)


def test_ward_agrees_with_scipy_hierarchy():
    rng = np.random.default_rng(11)
    centres = rng.normal(0, 4, (5, 3))
    scores = np.vstack([c + rng.standard_normal((30, 3)) for c in centres])
    cuts = ward_cuts(scores, range(2, 9))
    tree = linkage(scores, method="ward")  # scipy.cluster.hierarchy
    for k, labels in cuts.items():
        reference = fcluster(tree, k, criterion="maxclust")
        assert np.unique(labels).size == k
        assert adjusted_rand_score(reference, labels) == 1.0, k  # the same partition
    chosen = group_samples(scores, 5, method="ward")
    assert adjusted_rand_score(fcluster(tree, 5, criterion="maxclust"), chosen.labels) == 1.0


def test_k_means_is_scikit_learns_and_auto_prefers_the_planted_number():
    from sklearn.cluster import KMeans

    rng = np.random.default_rng(5)
    truth = np.repeat(np.arange(4), 25)
    scores = np.array([[0.0, 0.0], [10.0, 0.0], [0.0, 10.0], [10.0, 10.0]])[truth] + rng.standard_normal((100, 2))
    found = group_samples(scores, "auto", method="k-means", max_groups=7, seed=2)
    assert found.n_groups == 4 and found.method == "k-means"
    assert adjusted_rand_score(truth, found.labels) >= 0.95  # planted truth
    reference = KMeans(n_clusters=4, n_init=10, random_state=2).fit_predict(scores)
    assert adjusted_rand_score(reference, found.labels) == 1.0  # scikit-learn's own result
    assert list(found.candidates["n_groups"]) == list(range(2, 8))


def test_annotation_profiles_against_the_hypergeometric_law(planted_fit):
    from axiscope.explain.annotations import load_annotations

    folder, X, truth = planted_fit
    found = find_groups(folder / "fit", n_groups=3, features=False)
    rng = np.random.default_rng(1)
    tissue = np.where(rng.random(truth.size) < 0.8, np.array(["a", "b", "c"])[truth], "d")
    table = pd.DataFrame({"sample_id": found.sample_ids, "tissue": tissue, "age": rng.normal(50, 10, truth.size)})
    ann = load_annotations(table, found.sample_ids)
    profile = annotation_profiles(ann, found.labels)
    N = truth.size
    for row in profile[profile["treated_as"] == "categorical"].to_dict("records"):
        member = found.labels == row["group"]
        n, K, k = int(member.sum()), int((tissue == row["category"]).sum()), int(row["n_group"])
        assert k == int((tissue[member] == row["category"]).sum())
        # the definition: P(X ≥ k) = Σ_{i ≥ k} C(K, i)·C(N − K, n − i) / C(N, n)
        tail = sum(math.comb(K, i) * math.comb(N - K, n - i) for i in range(k, min(K, n) + 1)) / math.comb(N, n)
        assert row["p_value"] == pytest.approx(tail, rel=1e-9, abs=1e-300)
        assert row["p_value"] == pytest.approx(sps.hypergeom.sf(k - 1, N, K, n), rel=1e-9, abs=1e-300)
        # scipy.stats.fisher_exact, one-sided, on the 2 × 2 table gives the same tail
        fisher = sps.fisher_exact([[k, n - k], [K - k, N - n - K + k]], alternative="greater").pvalue
        assert row["p_value"] == pytest.approx(fisher, rel=1e-6, abs=1e-300)
    age = table["age"].to_numpy()
    for row in profile[profile["annotation"] == "age"].to_dict("records"):
        member = found.labels == row["group"]
        n_g = member.sum()
        z = (age[member].mean() - age.mean()) / np.sqrt(age.var() / n_g * (N - n_g) / (N - 1))
        assert row["z"] == pytest.approx(z, rel=1e-10)
    p = profile["p_value"].to_numpy()  # Benjamini–Hochberg over all rows, recomputed from the definition
    order = np.argsort(p)
    raw = p[order] * p.size / np.arange(1, p.size + 1)
    expected = np.empty_like(p)
    expected[order] = np.minimum(np.minimum.accumulate(raw[::-1])[::-1], 1.0)
    np.testing.assert_allclose(profile["p_adjusted"].to_numpy(), expected, rtol=1e-12)


def test_one_pass_sums_do_not_depend_on_blocks_and_leave_missing_cells_out(monkeypatch):
    import axiscope.decide.groups as groups
    from axiscope import PreprocessSpec
    from axiscope.io import array_source

    rng = np.random.default_rng(9)
    X = rng.normal(100.0, 2.0, (90, 7))
    X[70, 2] = np.nan  # missing cells first met in a late block
    X[85, 5] = np.nan
    labels = np.repeat([1, 2, 3], 30)
    spec = PreprocessSpec(missing="mean")
    whole = feature_group_sums(array_source(X), labels, spec=spec, threads=1)
    monkeypatch.setattr(groups, "_block_rows", lambda *args: 13)  # seven blocks, the last ones with NaN
    runner = groups.PassRunner(threads=2)
    small = feature_group_sums(array_source(X), labels, spec=spec, threads=2, runner=runner)
    assert runner.n_passes == 1 and runner.records[0].n_blocks == 7
    a, b = whole.moments(), small.moments()
    for g in range(3):  # numpy's nan-aware means and variances over the present cells
        part = X[labels == g + 1]
        np.testing.assert_allclose(a["group_mean"][g], np.nanmean(part, axis=0), rtol=1e-13)
        np.testing.assert_allclose(a["group_sd"][g], np.nanstd(part, axis=0), rtol=1e-9)
        np.testing.assert_array_equal(a["n_group"][g], (~np.isnan(part)).sum(axis=0))
    np.testing.assert_allclose(a["mean"], np.nanmean(X, axis=0), rtol=1e-13)
    np.testing.assert_allclose(a["variance"], np.nanvar(X, axis=0), rtol=1e-9)
    for key in a:
        np.testing.assert_allclose(b[key], a[key], rtol=1e-10, atol=1e-12)
    with pytest.raises(InputError, match="is NaN or infinite"):
        feature_group_sums(array_source(X), labels, threads=1)


def test_bad_requests_are_refused_before_any_work(planted_fit, tmp_path):
    folder, X, truth = planted_fit
    with pytest.raises(OptionError, match=r"^n_groups=120 is not fewer than the 120 samples"):
        find_groups(folder / "fit", n_groups=120)
    with pytest.raises(OptionError, match=r"^n_axes=5 is more than the 4 axes of the fit"):
        find_groups(folder / "fit", n_axes=5)
    with pytest.raises(OptionError, match="method='hierarchical' is not one of"):
        find_groups(folder / "fit", method="hierarchical")
    (tmp_path / "empty").mkdir()
    with pytest.raises(InputError, match=r"not an axiscope fit result \(manifest.json is missing\)"):
        find_groups(tmp_path / "empty")
    with pytest.raises(InputError, match="the fitted matrix is not there"):
        _moved(folder, tmp_path)


def _moved(folder: Path, tmp_path: Path):
    """The fit's result folder copied elsewhere with its manifest naming a matrix that is gone."""
    import shutil

    copy = tmp_path / "copy"
    shutil.copytree(folder / "fit", copy)
    manifest = json.loads((copy / "manifest.json").read_text())
    manifest["input"]["path"] = str(tmp_path / "gone.npy")
    (copy / "manifest.json").write_text(json.dumps(manifest))
    return find_groups(copy)


def test_command_writes_the_tables_and_the_report_shows_them(planted_fit, tmp_path):
    from axiscope.report.html import GROUP_COLOUR, build_report

    folder, X, truth = planted_fit
    out = tmp_path / "groups"
    result = CliRunner().invoke(app, ["groups", str(folder / "fit"), "--out", str(out), "--groups", "3",
                                      "--annotations", str(folder / "annotations.tsv"), "--threads", "1",
                                      "--format", "parquet"])
    assert result.exit_code == 0, result.output
    assignments = pd.read_csv(out / "assignments.tsv", sep="\t")
    assert list(assignments.columns) == ["sample_id", "group"]
    assert adjusted_rand_score(truth, assignments["group"]) >= 0.95  # planted truth
    for name in ("assignments", "groups", "group_counts", "group_members", "group_features", "group_annotations"):
        assert pd.read_parquet(out / f"{name}.parquet").shape == pd.read_csv(out / f"{name}.tsv", sep="\t").shape
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["n_groups"] == 3 and len(manifest["lines"]) == 3
    assert result.output.count("  Group ") == 3 and "mostly tissue = " in result.output
    assert (out / "groups.md").read_text().count("- Group ") == 3
    page = build_report(folder / "fit", groups_dir=out, out=tmp_path / "report.html").read_text()
    assert 'id="groups"' in page and "Features higher than elsewhere" in page and GROUP_COLOUR in page
