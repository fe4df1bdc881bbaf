"""Static figures: every figure draws what the tables say, and the files are sound.

Figure functions are checked on the artists they create (bars, lines, collections,
patches, texts, each marked with a ``gid``), against the numbers they were given or
against an outside reference named beside each check: the confidence ellipse of a mean
against its closed form (numpy.linalg.eigh and scipy.stats.chi2) and its coverage against
Hotelling's T² distribution (scipy.stats.f); the files against Python's xml.etree (SVG)
and matplotlib's PNG reader. Data are invented with their truth planted.
"""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET

import numpy as np
import pandas as pd
import pytest
from scipy import stats as sps
from typer.testing import CliRunner

from axiscope.cli import app
from axiscope.errors import InputError, OptionError
from axiscope.report import figures as F
from axiscope.report import style

runner = CliRunner()


def gids(fig, prefix: str) -> list:
    """Artists of the figure whose gid starts with ``prefix``."""
    return [a for a in fig.findobj(lambda a: (a.get_gid() or "").startswith(prefix))]


def exact(fig, gid: str) -> list:
    """Artists of the figure whose gid is ``gid``."""
    return [a for a in fig.findobj(lambda a: a.get_gid() == gid)]


def offsets(collections) -> np.ndarray:
    return np.concatenate([c.get_offsets() for c in collections]) if collections else np.empty((0, 2))


def same_points(a: np.ndarray, b: np.ndarray) -> bool:
    key = lambda x: sorted(map(tuple, np.round(np.asarray(x, dtype=float), 9)))  # noqa: E731
    return key(a) == key(b)


def planted_scores(n_per: int = 40, seed: int = 0):
    """Three groups with planted centres on two axes."""
    rng = np.random.default_rng(seed)
    centres = {"a": (-4.0, 0.0), "b": (4.0, 1.0), "c": (0.0, 5.0)}
    rows, labels = [], []
    for name, centre in centres.items():
        rows.append(rng.normal(centre, (1.0, 0.6), size=(n_per, 2)))
        labels += [name] * n_per
    xy = np.vstack(rows)
    ids = np.array([f"s{i:03d}" for i in range(len(xy))], dtype=object)
    scores = pd.DataFrame({"sample_id": ids, "PC1": xy[:, 0], "PC2": xy[:, 1]})
    colour = F.Colouring("group", "categorical", pd.Series(labels, index=pd.Index(ids, dtype=object), dtype=object),
                         ["a", "b", "c"])
    return scores, colour


# ----------------------------------------------------------------------------- variance


def test_variance_figure_draws_the_shares_and_the_thresholds():
    ratio = np.array([0.4, 0.25, 0.1, 0.05])
    table = pd.DataFrame({"axis": ["PC1", "PC2", "PC3", "PC4"], "variance": ratio * 10,
                          "variance_ratio": ratio, "cumulative_ratio": np.cumsum(ratio)})
    fig = F.variance_figure(table, thresholds={"equal share": 0.2, "by chance": [0.3, 0.2, 0.15, 0.1]}, chosen=2)
    bars = gids(fig, "variance-bar")
    assert [b.get_height() for b in bars] == pytest.approx(100 * ratio)
    (line,) = gids(fig, "cumulative")
    assert line.get_ydata() == pytest.approx(100 * np.cumsum(ratio))
    flat, curve = gids(fig, "threshold-0")[0], gids(fig, "threshold-1")[0]
    assert flat.get_ydata() == pytest.approx([20.0, 20.0])
    assert curve.get_ydata() == pytest.approx([30.0, 20.0, 15.0, 10.0])
    assert gids(fig, "chosen")[0].get_xdata() == pytest.approx([2.5, 2.5])
    assert fig.axes[0].get_title(loc="left") == "Variance carried by each axis"


# ---------------------------------------------------------------------------- sample map


def test_each_category_draws_one_centre_and_one_ellipse():
    scores, colour = planted_scores()
    fig = F.sample_map(scores, ("PC1", "PC2"), variance_ratio={"PC1": 0.31, "PC2": 0.12}, colour=colour)
    assert len(gids(fig, "centre-ellipse")) == 3
    assert fig.axes[0].get_xlabel() == "PC1 (31.0% of variance)"
    # one category: one ellipse; a category of two samples has a centre but no ellipse
    one = F.Colouring("group", "categorical", pd.Series("a", index=colour.values.index, dtype=object), ["a"])
    assert len(gids(F.sample_map(scores, colour=one), "centre-ellipse")) == 1
    labels = colour.values.copy()
    labels.iloc[:2] = "tiny"
    two = F.Colouring("group", "categorical", labels, ["a", "b", "c", "tiny"])
    fig = F.sample_map(scores, colour=two)
    assert len(gids(fig, "centre-ellipse")) == 3 and len(gids(fig, "centre-")) == 3 + 4


def test_ellipse_of_a_centre_matches_the_closed_formula():
    # Large-sample confidence region of a mean vector, n(x̄−μ)ᵀS⁻¹(x̄−μ) ≤ χ²₂(0.95):
    # semi-axes sqrt(λ_i χ²₂(0.95)) of S/n (Johnson & Wichern, Applied Multivariate
    # Statistical Analysis, 6th ed., §5.5; recalled from memory), via numpy.linalg.eigh and
    # scipy.stats.chi2.
    scores, colour = planted_scores(n_per=60, seed=3)
    fig = F.sample_map(scores, colour=colour)
    patches = {p.get_label(): p for p in gids(fig, "centre-ellipse")}
    for level in ("a", "b", "c"):
        xy = scores[["PC1", "PC2"]].to_numpy()[colour.values.to_numpy() == level]
        S = np.cov(xy.T, ddof=1) / len(xy)
        lam, vec = np.linalg.eigh(S)
        n = len(xy)  # Hotelling's T² radius (Johnson & Wichern §5.2, recalled from memory)
        q = 2 * (n - 1) / (n - 2) * sps.f.ppf(0.95, 2, n - 2)
        patch = patches[level]
        assert patch.center == pytest.approx(xy.mean(axis=0), rel=1e-12)
        assert patch.width == pytest.approx(2 * math.sqrt(lam[1] * q), rel=1e-10)
        assert patch.height == pytest.approx(2 * math.sqrt(lam[0] * q), rel=1e-10)
        expected = math.degrees(math.atan2(vec[1, 1], vec[0, 1])) % 180
        assert patch.angle % 180 == pytest.approx(expected, abs=1e-8)


def test_ellipse_covers_the_true_centre_as_often_as_hotelling_says():
    # Planted: bivariate normal samples of size n around a known centre. The ellipse is
    # Hotelling's 95% region, T² ≤ 2(n−1)/(n−2)·F(2, n−2; 0.95) (Johnson & Wichern §5.2,
    # recalled from memory): it covers the centre 95% of the time at any n. 3000 replicates:
    # binomial standard error ≈ 0.004. The chi-square radius would cover 89% at n = 12.
    from matplotlib.patches import Ellipse

    rng = np.random.default_rng(11)
    n, reps, truth = 12, 3000, np.array([1.5, -2.0])
    cov = np.array([[2.0, 1.2], [1.2, 1.5]])
    chol = np.linalg.cholesky(cov)
    inside = 0
    for _ in range(reps):
        xy = truth + rng.standard_normal((n, 2)) @ chol.T
        centre, width, height, angle = F.centre_ellipse(xy)
        unit = Ellipse(tuple(centre), width, height, angle=angle).get_patch_transform().inverted().transform(truth)
        inside += np.hypot(*unit) <= 1.0
    expected = 0.95
    se = math.sqrt(expected * (1 - expected) / reps)
    assert abs(inside / reps - expected) < 4 * se


def test_flagged_samples_are_ringed_and_new_samples_have_their_marker():
    scores, colour = planted_scores()
    rng = np.random.default_rng(5)
    new = pd.DataFrame({"sample_id": [f"new{i}" for i in range(10)], "PC1": rng.normal(0, 3, 10),
                        "PC2": rng.normal(0, 3, 10)})
    supp = pd.DataFrame({"sample_id": ["sup0", "sup1"], "PC1": [1.0, 2.0], "PC2": [3.0, 4.0]})
    flagged = ["new2", "new7", "s005"]
    fig = F.sample_map(scores, colour=colour, new=new, supplementary=supp, flagged=flagged)
    (ring,) = gids(fig, "flagged")
    expected = np.vstack([new.iloc[[2, 7]][["PC1", "PC2"]].to_numpy(), scores.iloc[[5]][["PC1", "PC2"]].to_numpy()])
    assert same_points(ring.get_offsets(), expected)
    assert ring.get_facecolor().size == 0 or ring.get_facecolor()[:, 3].max() == 0  # a hollow ring
    assert np.allclose(ring.get_edgecolor()[:, :3], 0.0) and ring.get_sizes()[0] == style.FLAGGED["s"]
    assert same_points(offsets(gids(fig, "new-samples")), new[["PC1", "PC2"]].to_numpy())
    assert same_points(offsets(gids(fig, "supplementary")), supp[["PC1", "PC2"]].to_numpy())
    assert same_points(offsets(gids(fig, "samples")), scores[["PC1", "PC2"]].to_numpy())
    # none flagged: no ring at all
    assert gids(F.sample_map(scores, colour=colour, new=new), "flagged") == []


def test_density_appears_above_the_threshold_only():
    rng = np.random.default_rng(2)
    xy = rng.standard_normal((400, 2)) * [3.0, 1.0]
    scores = pd.DataFrame({"sample_id": [f"s{i}" for i in range(400)], "PC1": xy[:, 0], "PC2": xy[:, 1]})
    below = F.sample_map(scores, density_above=400)
    assert gids(below, "density") == [] and len(offsets(gids(below, "samples"))) == 400
    above = F.sample_map(scores, density_above=399, extreme_points=50)
    (density,) = gids(above, "density")
    assert density.get_array().sum() == 400  # every sample counted in the bins
    drawn = offsets(gids(above, "samples"))
    # the 50 samples farthest from the centre, each axis in units of its standard deviation (numpy)
    z = (xy - xy.mean(axis=0)) / xy.std(axis=0)
    farthest = xy[np.argsort(-(z**2).sum(axis=1))[:50]]
    assert same_points(drawn, farthest)


def test_numeric_annotation_gets_a_colour_bar_with_its_values():
    scores, _ = planted_scores()
    values = pd.Series(np.linspace(0, 1, len(scores)), index=pd.Index(scores["sample_id"], dtype=object))
    values.iloc[3] = np.nan
    fig = F.sample_map(scores, colour=F.Colouring("age", "numeric", values, []))
    assert len(fig.axes) == 2 and fig.axes[1].get_ylabel() == "age"  # the colour bar
    (points,) = exact(fig, "samples")
    assert np.asarray(points.get_array()) == pytest.approx(np.delete(values.to_numpy(), 3))
    assert len(offsets(gids(fig, "samples-no-value"))) == 1


def test_quality_map_shades_by_the_squared_cosine_on_the_pair():
    scores, _ = planted_scores()
    rng = np.random.default_rng(4)
    stats = pd.DataFrame({"sample_id": scores["sample_id"], "supplementary": False,
                          "sq_cosine_PC1": rng.uniform(0, 0.5, len(scores)),
                          "sq_cosine_PC2": rng.uniform(0, 0.4, len(scores))})
    fig = F.quality_map(scores, stats, ("PC1", "PC2"))
    (points,) = exact(fig, "samples")
    assert np.asarray(points.get_array()) == pytest.approx((stats["sq_cosine_PC1"] + stats["sq_cosine_PC2"]).to_numpy())
    assert "squared cosine" in fig.axes[1].get_ylabel()


# --------------------------------------------------------------------------- feature map


def _correlations(p: int = 40, seed: int = 1):
    rng = np.random.default_rng(seed)
    angle = rng.uniform(0, 2 * np.pi, p)
    radius = rng.uniform(0.05, 0.98, p)
    return [f"gene<{j}>&'x\"" for j in range(p)], np.column_stack([radius * np.cos(angle), radius * np.sin(angle)])


@pytest.mark.parametrize("top", [1, 5, 12])
def test_correlation_circle_draws_and_labels_exactly_the_top_features(top):
    ids, values = _correlations()
    fig = F.feature_map(ids, values, ("PC1", "PC2"), kind="correlation", top=top)
    arrows, labels = gids(fig, "feature-arrow"), gids(fig, "feature-label")
    assert len(arrows) == top and len(labels) == top
    longest = np.argsort(-(values**2).sum(axis=1))[:top]  # numpy: the longest vectors on the pair
    assert {t.get_text() for t in labels} == {ids[j] for j in longest}
    tips = np.array([a.get_path().vertices @ np.eye(2) for a in arrows], dtype=object)
    assert len(tips) == top
    # labels do not overlap once placed
    renderer = fig.canvas.get_renderer()
    boxes = [t.get_window_extent(renderer) for t in labels]
    assert not any(boxes[i].overlaps(boxes[j]) for i in range(top) for j in range(i + 1, top))


def test_svg_files_survive_awkward_ids(tmp_path):
    # ids holding XML syntax: the SVG must still parse (Python's xml.etree)
    ids = ["a--b", "c-->d", "<!--x", "e]]>f", "g&amp;h", 'q"uote', "it's"]
    values = np.array([[0.5, 0.1], [0.2, 0.6], [-0.4, 0.3], [0.1, -0.7], [-0.6, -0.2], [0.3, 0.3], [-0.1, 0.4]])
    scores = pd.DataFrame({"sample_id": ids * 3, "PC1": np.arange(21.0), "PC2": np.arange(21.0) % 5})
    scores["sample_id"] = [f"{i}{k}" for k, i in enumerate(scores["sample_id"])]
    colour = F.Colouring("<kind & \"sort\">", "categorical",
                         pd.Series(ids * 3, index=pd.Index(scores["sample_id"], dtype=object), dtype=object), ids)
    with F._style():
        F.feature_map(ids, values, top=7).savefig(tmp_path / "features.svg")
        F.sample_map(scores, colour=colour, flagged=list(scores["sample_id"][:3])).savefig(tmp_path / "samples.svg")
    for name in ("features.svg", "samples.svg"):
        assert ET.parse(tmp_path / name).getroot().tag.endswith("svg")


def test_loading_map_labels_the_top_features_without_arrows():
    ids, values = _correlations()
    fig = F.feature_map(ids, values * 0.1, kind="loading", top=6)
    assert gids(fig, "feature-arrow") == [] and len(gids(fig, "feature-label")) == 6
    assert len(offsets(gids(fig, "feature-top"))) == 6 and len(offsets(gids(fig, "features"))) == 34


# ------------------------------------------------------------------ contributions, T²/Q


def test_contributions_are_the_largest_against_the_equal_share():
    rng = np.random.default_rng(8)
    feat = rng.dirichlet(np.ones(50)) * 100
    samp = rng.dirichlet(np.ones(80)) * 100
    fig = F.contributions_figure("PC2", feature_ids=[f"f{j}" for j in range(50)], feature_contributions=feat,
                                 sample_ids=[f"s{i}" for i in range(80)], sample_contributions=samp, top=7)
    widths = [b.get_width() for b in gids(fig, "features-bar")]
    assert widths == pytest.approx(np.sort(feat)[::-1][:7])
    assert [b.get_width() for b in gids(fig, "samples-bar")] == pytest.approx(np.sort(samp)[::-1][:7])
    assert gids(fig, "features-uniform")[0].get_xdata() == pytest.approx([100 / 50] * 2)
    assert gids(fig, "samples-uniform")[0].get_xdata() == pytest.approx([100 / 80] * 2)


def test_diagnostics_draw_both_limits_and_name_the_flagged_samples():
    rng = np.random.default_rng(9)
    n = 60
    t2, q = rng.chisquare(3, n), rng.chisquare(20, n)
    t2[:3] += 15.0  # planted: three beyond the T² limit, two beyond the Q limit
    q[3:5] += 40.0
    flag = np.where(t2 > 9.0, "t2", "within").astype(object)
    flag[q > 35.0] = "q"
    diag = pd.DataFrame({"sample_id": [f"n<{i}>" for i in range(n)], "t2": t2, "q": q, "flag": flag,
                         "confidence": 0.99, "t2_limit": 9.0, "q_limit": 35.0, "t2_limit_95": 7.0,
                         "q_limit_95": 30.0})
    fig = F.diagnostics_figure(diag)
    assert gids(fig, "t2-limit")[0].get_xdata() == pytest.approx([9.0, 9.0])
    assert gids(fig, "q-limit")[0].get_ydata() == pytest.approx([35.0, 35.0])
    assert gids(fig, "t2-limit-95")[0].get_xdata() == pytest.approx([7.0, 7.0])
    flagged = flag != "within"
    assert flagged[:5].all()
    assert same_points(gids(fig, "flagged")[0].get_offsets(), np.column_stack([t2, q])[flagged])
    assert sorted(t.get_text() for t in gids(fig, "flagged-label")) == sorted(diag["sample_id"][flagged])


# ------------------------------------------------------------- a fit on disk, end to end

#: Ids that must not break an SVG file or a table.
AWKWARD = ['a<b', 'c&d', 'say "hi"', "it's", "x>y&z"]


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    """A small fit with annotations and supplementary samples, and a scoring run, via the CLI."""
    root = tmp_path_factory.mktemp("figures")
    rng = np.random.default_rng(21)
    n, p, n_new = 90, 30, 12
    group = np.repeat(["north & <west>", 'say "south"', "east"], n // 3)
    shift = {g: rng.normal(0, 3, p) for g in np.unique(group)}
    X = rng.standard_normal((n + n_new, p)) + np.vstack([shift[g] for g in group] + [np.tile(shift["east"], (n_new, 1))])
    X[-2:] += 12 * rng.standard_normal((2, p))  # two new samples off the model
    ids = [f"s{i:03d}" for i in range(n + n_new)]
    ids[:len(AWKWARD)] = AWKWARD
    features = [f"f{j:02d}" for j in range(p)]
    features[0] = "gene<1>&\"q\""
    np.save(root / "train.npy", X[:n])
    np.save(root / "new.npy", X[n:])
    (root / "train_ids.txt").write_text("\n".join(ids[:n]) + "\n")
    (root / "new_ids.txt").write_text("\n".join(ids[n:]) + "\n")
    (root / "features.txt").write_text("\n".join(features) + "\n")
    supp = np.zeros(n, dtype=bool)
    supp[[10, 40, 70]] = True
    ann = pd.DataFrame({"sample_id": ids[:n] + ids[n:], "group": list(group) + ["east"] * n_new,
                        "age": rng.uniform(20, 80, n + n_new).round(1),
                        "left_out": list(supp) + [False] * n_new})
    ann.to_csv(root / "ann.tsv", sep="\t", index=False)  # reference and new samples
    ann.iloc[:n].to_csv(root / "ann_fit.tsv", sep="\t", index=False)
    r = runner.invoke(app, ["fit", str(root / "train.npy"), "--out", str(root / "fit"), "-k", "4", "--method", "exact",
                            "--sample-ids", str(root / "train_ids.txt"), "--feature-ids", str(root / "features.txt"),
                            "--annotations", str(root / "ann_fit.tsv"), "--supplementary-samples-column", "left_out",
                            "--quiet"])
    assert r.exit_code == 0, r.output
    r = runner.invoke(app, ["score", str(root / "fit"), str(root / "new.npy"), "--out", str(root / "score"),
                            "--sample-ids", str(root / "new_ids.txt"), "--feature-ids", str(root / "features.txt"),
                            "--quiet"])
    assert r.exit_code == 0, r.output
    return root


def test_figures_command_writes_every_figure_as_png_and_svg(fitted):
    out = fitted / "figs"
    r = runner.invoke(app, ["figures", str(fitted / "fit"), "--annotations", str(fitted / "ann.tsv"),
                            "--color-by", "group", "--pairs", "2,3",
                            "--scores-dir", str(fitted / "score"), "--out", str(out)])
    assert r.exit_code == 0, r.output
    stems = ["variance", "samples_PC2_PC3", "quality_PC2_PC3", "features_PC2_PC3", "contributions_PC2",
             "contributions_PC3", "diagnostics"]
    assert sorted(p.name for p in out.iterdir()) == sorted(f"{s}.{e}" for s in stems for e in ("png", "svg"))
    assert f"{len(stems)} figures" in r.stdout
    from matplotlib.image import imread

    for stem in stems:
        png = imread(out / f"{stem}.png")  # matplotlib's PNG reader
        assert png.ndim == 3 and png.shape[0] > 300 and png[..., :3].std() > 0.01  # not blank
        root = ET.parse(out / f"{stem}.svg").getroot()  # the standard library's XML parser
        assert root.tag.endswith("svg") and len(list(root.iter())) > 50
    # 150 dpi: a map of 6.4 × 5.4 inches is 960 × 810 pixels
    assert imread(out / "samples_PC2_PC3.png").shape[:2] == (810, 960)
    svg = ET.parse(out / "samples_PC2_PC3.svg").getroot()
    ids = {el.get("id") for el in svg.iter()}
    assert "flagged" in ids and "supplementary-0" in ids and {"centre-ellipse-0", "centre-ellipse-1"} <= ids


def test_write_figures_reads_the_tables_it_draws(fitted):
    records = F.read_fit_records(fitted / "fit")
    scored = F.read_score_records(fitted / "score", records)
    assert records.standardized and records.features is not None and records.supplementary_scores is not None
    assert len(records.supplementary_scores) == 3 and set(AWKWARD) <= set(records.scores["sample_id"])
    # the flags come from diagnostics.tsv as written (pandas reads it back)
    table = pd.read_csv(fitted / "score" / "diagnostics.tsv", sep="\t")
    assert list(scored.flagged_ids) == list(table.loc[table["flag"] != "within", "sample_id"])
    assert {"s100", "s101"} <= set(scored.flagged_ids)  # the two planted off the model
    written = F.write_figures(fitted / "fit", fitted / "png-only", formats=["png"], pairs=[(1, 2)],
                              annotations=pd.read_csv(fitted / "ann.tsv", sep="\t"))
    assert written and all(p.suffix == ".png" and p.stat().st_size > 1000 for p in written)
    assert [p.stem for p in written][:4] == ["variance", "samples_PC1_PC2", "quality_PC1_PC2", "features_PC1_PC2"]


def test_default_colouring_takes_the_annotation_lining_up_with_the_first_axis(fitted):
    records = F.read_fit_records(fitted / "fit")
    colour = F.annotation_colours(fitted / "ann.tsv", cards=records.cards, first_axis="PC1")
    assert colour.name == "group" and colour.kind == "categorical" and len(colour.levels) == 3
    age = F.annotation_colours(fitted / "ann.tsv", color_by="age")
    assert age.kind == "numeric" and age.values["a<b"] == pytest.approx(
        float(pd.read_csv(fitted / "ann.tsv", sep="\t").set_index("sample_id").loc["a<b", "age"]))


def test_bad_requests_fail_with_one_line(fitted, tmp_path):
    with pytest.raises(OptionError, match="color_by='nope'"):
        F.write_figures(fitted / "fit", tmp_path / "a", annotations=fitted / "ann.tsv", color_by="nope")
    with pytest.raises(OptionError, match=r"pairs=\(1, 9\): the fit has 4 axes"):
        F.write_figures(fitted / "fit", tmp_path / "b", pairs=[(1, 9)])
    with pytest.raises(OptionError, match="formats"):
        F.write_figures(fitted / "fit", tmp_path / "c", formats=["pdf"])
    other = pd.DataFrame({"sample_id": ["zz1", "zz2"], "group": ["a", "b"]})
    with pytest.raises(InputError, match="none of the 87 samples"):
        F.write_figures(fitted / "fit", tmp_path / "d", annotations=other)
    with pytest.raises(InputError, match="not an axiscope fit result"):
        F.write_figures(tmp_path, tmp_path / "e")
    (tmp_path / "exists").mkdir()
    r = runner.invoke(app, ["figures", str(fitted / "fit"), "--out", str(tmp_path / "exists")])
    assert r.exit_code == 2 and "already exists" in r.output and "--overwrite" in r.output
    r = runner.invoke(app, ["figures", str(fitted / "fit"), "--pairs", "1,9", "--out", str(tmp_path / "f")])
    assert r.exit_code == 2 and "--pairs (1, 9): the fit has 4 axes" in r.output and not (tmp_path / "f").exists()
    r = runner.invoke(app, ["figures", str(fitted / "fit"), "--pairs", "1-2", "--out", str(tmp_path / "g")])
    assert r.exit_code == 2 and "--pairs 1-2" in r.output
    r = runner.invoke(app, ["figures", str(fitted / "fit"), "--color-by", "x", "--annotations",
                            str(fitted / "ann.tsv"), "--out", str(tmp_path / "h")])
    assert r.exit_code == 2 and "--color-by x" in r.output and len(r.output.strip().splitlines()) == 1


def test_scoring_run_of_another_model_is_refused(fitted, tmp_path):
    import shutil

    other = tmp_path / "score"
    shutil.copytree(fitted / "score", other)
    manifest = (other / "manifest.json").read_text().replace('"checksum": "', '"checksum": "0')
    (other / "manifest.json").write_text(manifest)
    with pytest.raises(InputError, match="another model"):
        F.write_figures(fitted / "fit", tmp_path / "figs", diagnostics_dir=other)
