"""The share of an axis explained by an annotation (R²), its F-test, and the category z-scores.

References, named beside each check: scipy.stats.pearsonr, scipy.stats.f_oneway,
scipy.stats.false_discovery_control, and the variance of the mean of a sample drawn without
replacement from a finite population (Cochran, W. G., *Sampling Techniques*, 3rd ed., Wiley
1977, Theorem 2.2: V(ȳ) = (S²/n)(1 − f), S² = Σ(y − Ȳ)²/(N − 1), f = n/N; recalled from
memory, and checked here by enumerating every possible sample).
Data: small invented arrays.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats as sps

from axiscope.explain.annotations import load_annotations
from axiscope.explain.associations import (
    annotation_shares,
    categorical_share,
    category_deviations,
    category_z,
    numeric_share,
)


def test_numeric_r_squared_and_p_value_match_pearsonr():
    rng = np.random.default_rng(0)
    F = rng.standard_normal((50, 3))
    x = F[:, 1] * 0.4 + rng.standard_normal(50)
    x[[3, 17, 40]] = np.nan
    share = numeric_share(x, F)
    ok = ~np.isnan(x)
    assert share.n == 47 and share.df_between == 1 and share.df_within == 45
    for a in range(3):
        ref = sps.pearsonr(x[ok], F[ok, a])  # reference: scipy.stats.pearsonr
        assert share.r_squared[a] == pytest.approx(ref.statistic**2, rel=1e-12)
        assert share.correlation[a] == pytest.approx(ref.statistic, rel=1e-12)
        assert share.p_value[a] == pytest.approx(ref.pvalue, rel=1e-9)


def test_categorical_r_squared_and_p_value_match_f_oneway():
    rng = np.random.default_rng(1)
    labels = np.array(["a"] * 7 + ["b"] * 12 + ["c"] * 5 + [None] * 3, dtype=object)
    F = rng.standard_normal((27, 2)) + np.where(labels == "b", 1.0, 0.0)[:, None]
    share = categorical_share(labels, F)
    n, g = 24, 3
    assert share.n == n and share.df_between == g - 1 and share.df_within == n - g
    for a in range(2):
        ref = sps.f_oneway(*(F[labels == c, a] for c in ("a", "b", "c")))  # reference: scipy.stats.f_oneway
        assert share.f_statistic[a] == pytest.approx(ref.statistic, rel=1e-10)
        assert share.p_value[a] == pytest.approx(ref.pvalue, rel=1e-9)
        # one-way ANOVA identity: R² = F(g − 1) / (F(g − 1) + n − g)
        expected = ref.statistic * (g - 1) / (ref.statistic * (g - 1) + n - g)
        assert share.r_squared[a] == pytest.approx(expected, rel=1e-10)


def test_category_z_uses_the_variance_of_a_mean_drawn_without_replacement():
    population = np.array([2.0, 3.5, 1.0, 7.0, 4.5, 0.5, 6.0, 3.0, 5.5])
    N, n = population.size, 4
    # exact: the variance of the mean over every one of the C(9, 4) = 126 possible samples
    means = np.array([population[list(c)].mean() for c in itertools.combinations(range(N), n)])
    exact = means.var()
    # Cochran (1977), Theorem 2.2, in his notation
    S2 = ((population - population.mean()) ** 2).sum() / (N - 1)
    cochran = S2 / n * (1 - n / N)
    assert exact == pytest.approx(cochran, rel=1e-12)
    # our z divides by the square root of that variance
    sample_mean = population[:n].mean()
    z = category_z(np.array([sample_mean]), n, np.array([population.mean()]), np.array([population.var()]), N)
    assert z[0] == pytest.approx((sample_mean - population.mean()) / math.sqrt(cochran), rel=1e-12)
    # a category holding every sample has no deviation to test
    assert np.isnan(category_z(np.array([1.0]), N, np.array([1.0]), np.array([2.0]), N)[0])


def test_category_table_on_a_hand_checkable_example():
    # six samples with scores 1..6; category "hi" = the last two, "lo" = the first four
    scores = np.arange(1.0, 7.0)[:, None]
    labels = np.array(["lo", "lo", "lo", "lo", "hi", "hi"], dtype=object)
    table = category_deviations(labels, scores, ["PC1"], annotation="g").set_index("category")
    N = 6
    S2 = ((np.arange(1, 7) - 3.5) ** 2).sum() / (N - 1)  # Cochran's S² = 3.5
    for category, n, mean in (("hi", 2, 5.5), ("lo", 4, 2.5)):
        expected = (mean - 3.5) / math.sqrt(S2 / n * (1 - n / N))  # Cochran (1977), Theorem 2.2
        assert table.loc[category, "z"] == pytest.approx(expected, rel=1e-12)
        assert table.loc[category, "n"] == n and table.loc[category, "category_mean"] == pytest.approx(mean)
        # two-sided p-value of a standard normal deviate (scipy.stats.norm)
        assert table.loc[category, "p_value"] == pytest.approx(2 * sps.norm.sf(abs(expected)), rel=1e-12)
    assert table.loc["hi", "z"] == pytest.approx(2 / math.sqrt(7 / 6), rel=1e-12)  # ≈ 1.8516, by hand


def test_one_ranking_for_numeric_and_categorical_annotations_with_bh_over_all_of_it():
    rng = np.random.default_rng(2)
    n = 80
    group = rng.choice(["u", "v", "w"], n)
    F = rng.standard_normal((n, 3))
    F[:, 0] += np.where(group == "w", 2.0, 0.0)
    table = pd.DataFrame({"sample_id": [f"s{i}" for i in range(n)], "group": group,
                          "dose": F[:, 1] + rng.standard_normal(n), "noise": rng.standard_normal(n)})
    ann = load_annotations(table, table.sample_id)
    shares, cats = annotation_shares(ann, F, ["PC1", "PC2", "PC3"])
    assert len(shares) == 9 and set(shares.treated_as) == {"numeric", "categorical"}
    # one table, ranked by R² within each axis
    for _, rows in shares.groupby("axis"):
        assert list(rows.r_squared) == sorted(rows.r_squared, reverse=True)
    assert shares.iloc[0].annotation == "group" and shares[shares.axis == "PC2"].iloc[0].annotation == "dose"
    # Benjamini–Hochberg over annotations × axes (reference: scipy.stats.false_discovery_control)
    np.testing.assert_allclose(shares.p_adjusted, sps.false_discovery_control(shares.p_value), rtol=1e-12)
    np.testing.assert_allclose(cats.p_adjusted, sps.false_discovery_control(cats.p_value), rtol=1e-12)
    w = cats[(cats.axis == "PC1") & (cats.category == "w")].iloc[0]
    assert w.z > 2 and w.category_mean > 1
