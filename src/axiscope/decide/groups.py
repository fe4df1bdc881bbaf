"""Groups of samples on the leading axes, and what sets each group apart.

Steps (:func:`find_groups`):

1. **Groups.** The samples are grouped on their first ``K`` scores by Ward's minimum-variance
   agglomerative clustering (Ward 1963; scikit-learn's implementation) up to
   :data:`~axiscope.defaults.WARD_MAX_SAMPLES` samples, and by k-means (Lloyd's algorithm with
   k-means++ starts, Arthur & Vassilvitskii 2007; scikit-learn's implementation) beyond, or on
   request. With ``n_groups="auto"`` every number of groups from 2 to ``max_groups`` is tried
   (one Ward tree, cut at each number; or one k-means run per number) and the number with the
   largest mean silhouette width (Rousseeuw 1987) is kept; each candidate's silhouette,
   Caliński–Harabasz index (Caliński & Harabasz 1974) and between-group share of the
   inertia on the ``K`` axes are reported. Groups are numbered 1, 2, … by decreasing size.
2. **Samples.** Per group: its size, its centre (mean score on each axis), the samples
   nearest to the centre (the most typical) and the farthest from it (the least typical),
   by Euclidean distance on the ``K`` axes.
3. **Features.** One streaming pass over the fitted matrix (the fit's per-sample transforms
   replayed, as for supplementary features) folds, per feature, each group's sum and sum of
   squares. A group's mean of feature ``j`` is compared with the mean of all ``n`` samples:
   if the group's ``n_g`` members were drawn at random without replacement from the ``n``,
   their mean would have variance ``σ_j²/n_g · (n − n_g)/(n − 1)`` (σ² the population
   variance of the ``n`` values; Cochran 1977, Theorem 2.2), so
   ``z = (mean_g − mean) / sqrt(σ²/n_g · (n − n_g)/(n − 1))`` is approximately standard
   normal. Two-sided p-values are adjusted by Benjamini–Hochberg over all features × groups.
   The features with the largest and the smallest z are listed per group.
4. **Annotations.** Numeric annotations get the same z-score; for categorical ones, the
   over-representation of each category in each group is tested by the hypergeometric
   upper tail ``P(X ≥ k)``, ``X ~ Hypergeometric(N, K, n)`` (N samples with a value, K of
   them in the category, n of the group's members with a value, k of those in the
   category), with scipy.stats.hypergeom. p-values of the annotation table are adjusted by
   Benjamini–Hochberg over all its rows.

Memory: the scores (n × K) and, for Ward's method, the n(n − 1)/2 distances of the tree;
the feature pass holds ``2·G·p`` float64 sums (``G`` groups, ``p`` features; ``3·G·p``
when missing cells are counted) and a window of row blocks sized from ``memory_limit``.

References
----------
Ward, J. H. (1963). Hierarchical grouping to optimize an objective function. *J. Am. Stat.
Assoc.* 58(301), 236–244. doi:10.1080/01621459.1963.10500845

Arthur, D. & Vassilvitskii, S. (2007). k-means++: the advantages of careful seeding.
*Proc. 18th ACM-SIAM Symposium on Discrete Algorithms*, 1027–1035.

Rousseeuw, P. J. (1987). Silhouettes: a graphical aid to the interpretation and
validation of cluster analysis. *J. Comput. Appl. Math.* 20, 53–65.
doi:10.1016/0377-0427(87)90125-7

Caliński, T. & Harabasz, J. (1974). A dendrite method for cluster analysis.
*Commun. Stat.* 3(1), 1–27. doi:10.1080/03610927408827101

Cochran, W. G. (1977). *Sampling Techniques*, 3rd ed. Wiley, New York. Theorem 2.2.

Benjamini, Y. & Hochberg, Y. (1995). Controlling the false discovery rate. *J. R. Stat.
Soc. B* 57(1), 289–300. doi:10.1111/j.2517-6161.1995.tb02031.x
"""

from __future__ import annotations

import json
import logging
import os
import time
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
from scipy import stats as sps

from ..core.memory import default_memory_limit, parse_memory, process_baseline
from ..core.passes import PassRunner, Progress, array_from_blocks
from ..core.plan import window_block_rows
from ..core.preprocess import PreprocessSpec, first_nonfinite, transform_block
from ..defaults import DEFAULT_MAX_GROUPS, DEFAULT_TOP_FEATURES, SAMPLES_PER_LIST, WARD_MAX_SAMPLES
from ..errors import InputError, OptionError, counted
from ..io import MatrixSource
from ..io.output import read_result_table
from ..model.statistics import benjamini_hochberg
from ..model.store import load_model

if TYPE_CHECKING:
    from ..explain.annotations import AnnotationSet
    from ..fitting.result import FitResult

__all__ = [
    "METHODS",
    "Grouping",
    "SampleGroups",
    "group_samples",
    "ward_cuts",
    "mean_z",
    "feature_group_sums",
    "FeatureGroupSums",
    "feature_profiles",
    "annotation_profiles",
    "describe_group",
    "find_groups",
    "PROFILE_COLUMNS",
    "ANNOTATION_COLUMNS",
    "GROUPS_DIR",
]

logger = logging.getLogger(__name__)

#: Clustering methods: ``auto`` (Ward's method up to WARD_MAX_SAMPLES samples, k-means beyond).
METHODS = ("auto", "ward", "k-means")
#: Where ``axiscope groups`` writes inside a result directory by default (and where the report looks).
GROUPS_DIR = "groups"
#: Silhouette widths are computed on at most this many samples (a seeded random subset
#: beyond): the exact width costs n² distances.
SILHOUETTE_SAMPLES = 5000
#: Level of the adjusted p-values that the one-line descriptions use (common practice, no source).
ALPHA = 0.05
#: Features finished at a time after the pass, so that temporaries stay small.
_STEP = 65536


# ----------------------------------------------------------------------------- grouping


@dataclass
class Grouping:
    """Groups of samples made on their scores.

    Attributes
    ----------
    labels : ndarray of int, shape (n,)
        Group of each sample, 1 … G, numbered by decreasing size.
    n_groups : int
    method : {"ward", "k-means"}
        The method used (``auto`` resolved).
    candidates : DataFrame
        One row per number of groups tried: ``n_groups``, ``silhouette``,
        ``calinski_harabasz``, ``between_share`` (between-group share of the inertia on the
        axes used) and ``chosen``.
    chosen_by : str
        How the number of groups was chosen, in words.
    """

    labels: np.ndarray
    n_groups: int
    method: str
    candidates: pd.DataFrame
    chosen_by: str


def _check_n_groups(n_groups: int | str, n: int) -> int | None:
    """The requested number of groups (None for ``auto``), checked against ``n`` samples."""
    if isinstance(n_groups, str):
        text = n_groups.strip().lower()
        if text == "auto":
            return None
        try:
            n_groups = int(text)
        except ValueError:
            raise OptionError(f"n_groups={n_groups!r} is neither 'auto' nor a whole number; pass e.g. 3 or auto") \
                from None
    if isinstance(n_groups, bool) or not isinstance(n_groups, (int, np.integer)):
        raise OptionError(f"n_groups={n_groups!r} is neither 'auto' nor a whole number; pass e.g. 3 or auto")
    n_groups = int(n_groups)
    if n_groups < 2:
        raise OptionError(f"n_groups={n_groups} is too few; ask for at least 2 groups or auto")
    if n_groups >= n:
        raise OptionError(f"n_groups={n_groups} is not fewer than the {counted(n, 'sample')} of the fit; "
                          f"ask for at most {n - 1} groups")
    return n_groups


def _resolve_method(method: str, n: int) -> str:
    if method not in METHODS:
        raise OptionError(f"method={method!r} is not one of {', '.join(METHODS)}; choose one of them")
    if method == "ward" and n > WARD_MAX_SAMPLES:
        logger.warning("Ward's method on %d samples holds %.1f GB of pairwise distances; method='k-means' "
                       "needs far less", n, 8 * n * (n - 1) / 2 / 1e9)
    if method != "auto":
        return method
    if n > WARD_MAX_SAMPLES:
        logger.info("%d samples: groups by k-means (Ward's method is used up to %d)", n, WARD_MAX_SAMPLES)
        return "k-means"
    return "ward"


def ward_cuts(scores: np.ndarray, sizes: Iterable[int]) -> dict[int, np.ndarray]:
    """Ward's agglomerative tree of the rows of ``scores``, cut into each number of groups in ``sizes``.

    The tree is built once by :class:`sklearn.cluster.AgglomerativeClustering` (full tree);
    cutting it into ``G`` groups undoes its last ``G − 1`` merges.

    Returns
    -------
    dict of int to ndarray of int, shape (n,)
        Labels 0 … G−1 (in no particular order) for each ``G``.
    """
    from sklearn.cluster import AgglomerativeClustering

    X = np.asarray(scores, dtype=np.float64)
    n = X.shape[0]
    tree = AgglomerativeClustering(n_clusters=None, distance_threshold=0.0, linkage="ward",
                                   compute_full_tree=True).fit(X)
    children = tree.children_  # merge m joins two nodes into node n + m
    out = {}
    for G in sorted(set(int(g) for g in sizes)):
        out[G] = _cut(children, n, G)
    return out


def _cut(children: np.ndarray, n: int, G: int) -> np.ndarray:
    """Labels 0 … G−1 of the ``n`` leaves of a merge tree after undoing its last ``G − 1`` merges."""
    label = np.full(2 * n - 1, -1, dtype=np.int64)
    if G == 1:
        label[2 * n - 2] = 0
    kept = 2 * n - G  # nodes n + m with m >= n − G are undone
    found = 0
    for m in range(n - 2, n - G - 1, -1):  # the undone merges, from the top: their children that stay are groups
        for child in children[m]:
            if child < kept:
                label[child] = found
                found += 1
    for m in range(n - G - 1, -1, -1):  # every kept node passes its group down to its children
        label[children[m]] = label[n + m]
    return label[:n]


def _kmeans(scores: np.ndarray, G: int, seed: int) -> np.ndarray:
    from sklearn.cluster import KMeans

    return KMeans(n_clusters=G, n_init=10, random_state=seed).fit_predict(np.asarray(scores, dtype=np.float64))


def _by_size(labels: np.ndarray) -> np.ndarray:
    """Labels renumbered 1 … G by decreasing group size (ties: the group met first)."""
    uniques, first, counts = np.unique(labels, return_index=True, return_counts=True)
    order = np.lexsort((first, -counts))
    new = np.empty(uniques.shape[0], dtype=np.int64)
    new[order] = np.arange(1, uniques.shape[0] + 1)
    return new[np.searchsorted(uniques, labels)]


def _candidate_row(X: np.ndarray, labels: np.ndarray, seed: int) -> dict:
    from sklearn.metrics import calinski_harabasz_score, silhouette_score

    n = X.shape[0]
    sample = SILHOUETTE_SAMPLES if n > SILHOUETTE_SAMPLES else None
    total = float(((X - X.mean(axis=0)) ** 2).sum())
    within = 0.0
    for g in np.unique(labels):
        part = X[labels == g]
        within += float(((part - part.mean(axis=0)) ** 2).sum())
    return {
        "n_groups": int(np.unique(labels).size),
        "silhouette": float(silhouette_score(X, labels, sample_size=sample, random_state=seed)),
        "calinski_harabasz": float(calinski_harabasz_score(X, labels)),
        "between_share": 1.0 - within / total if total > 0 else np.nan,
    }


def group_samples(scores: np.ndarray, n_groups: int | str = "auto", *, method: str = "auto",
                  max_groups: int = DEFAULT_MAX_GROUPS, seed: int = 0) -> Grouping:
    """Group samples on their scores.

    Parameters
    ----------
    scores : ndarray, shape (n, K)
        The scores on the axes to group on.
    n_groups : int or "auto", default="auto"
        Number of groups; ``auto`` tries 2 … ``max_groups`` and keeps the largest mean
        silhouette width (computed on a seeded subset of :data:`SILHOUETTE_SAMPLES`
        samples when there are more).
    method : {"auto", "ward", "k-means"}, default="auto"
        ``auto``: Ward's method up to :data:`~axiscope.defaults.WARD_MAX_SAMPLES` samples,
        k-means beyond.
    max_groups : int, default=DEFAULT_MAX_GROUPS
    seed : int, default=0
        Seed of k-means and of the silhouette's subset.

    Returns
    -------
    Grouping

    Notes
    -----
    Ward's method holds the ``n(n−1)/2`` pairwise distances (1.6 GB at 20,000 samples);
    k-means holds ``O(n·K)``. Auto with k-means costs one k-means run per candidate.
    """
    X = np.asarray(scores, dtype=np.float64)
    n = X.shape[0]
    wanted = _check_n_groups(n_groups, n)
    if wanted is None:
        if isinstance(max_groups, bool) or not isinstance(max_groups, (int, np.integer)) or max_groups < 2:
            raise OptionError(f"max_groups={max_groups!r} is not a whole number >= 2; pass e.g. 10")
        sizes = list(range(2, min(int(max_groups), n - 1) + 1))
        if not sizes:
            raise OptionError(f"{counted(n, 'sample')} are too few to form groups; need at least 3")
    else:
        sizes = [wanted]
    used = _resolve_method(method, n)
    from threadpoolctl import threadpool_limits

    # One thread: the scores are small, and OpenMP threads competing with other work on the
    # machine made k-means 20 times slower than on one thread (measured: 30 s against 1.5 s
    # for 10,000 samples × 10 axes, 8 groups, on a loaded 2-core machine).
    with threadpool_limits(limits=1):
        if used == "ward":
            cuts = ward_cuts(X, sizes)
        else:
            cuts = {G: _kmeans(X, G, seed) for G in sizes}
        rows = []
        for G in sizes:
            row = _candidate_row(X, cuts[G], seed)
            row["n_groups"] = G
            rows.append(row)
    candidates = pd.DataFrame(rows, columns=["n_groups", "silhouette", "calinski_harabasz", "between_share"])
    if wanted is None:
        best = int(candidates["n_groups"].iloc[int(np.nanargmax(candidates["silhouette"].to_numpy()))])
        chosen_by = (f"largest mean silhouette width among 2 to {sizes[-1]} groups"
                     + (f" (on a random subset of {SILHOUETTE_SAMPLES} samples)" if n > SILHOUETTE_SAMPLES else ""))
    else:
        best = wanted
        chosen_by = "as requested"
    candidates["chosen"] = candidates["n_groups"] == best
    return Grouping(_by_size(cuts[best]), best, used, candidates, chosen_by)


# ------------------------------------------------------------------------------ z-scores


def mean_z(group_mean, n_group, overall_mean, population_variance, n) -> np.ndarray:
    """z-score of the mean of ``n_group`` values against the mean of all ``n``, without replacement.

    ``z = (group_mean − overall_mean) / sqrt(σ²/n_g · (n − n_g)/(n − 1))``, σ² the
    population variance (divisor ``n``) of the ``n`` values (Cochran 1977, Theorem 2.2).
    Broadcasts; NaN where the group holds every value or the variance is 0.
    """
    n_group = np.asarray(n_group, dtype=np.float64)
    n = np.asarray(n, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        var = np.asarray(population_variance, dtype=np.float64) / n_group * (n - n_group) / (n - 1.0)
        z = (np.asarray(group_mean, dtype=np.float64) - overall_mean) / np.sqrt(var)
    return np.where((var > 0) & np.isfinite(var), z, np.nan)


def _two_sided(z: np.ndarray) -> np.ndarray:
    return 2.0 * sps.norm.sf(np.abs(z))


# -------------------------------------------------------------------------- feature pass


@dataclass
class FeatureGroupSums:
    """Per-feature sums of each group, folded over row blocks.

    Values are shifted by ``shift`` (the first row) so that the variance stays accurate
    (Chan, Golub & LeVeque 1983). ``count`` (values present per group and feature) exists
    only once a missing cell was seen; otherwise every group counts its size.

    Attributes
    ----------
    feature_ids : ndarray of str, shape (p,)
    sizes : ndarray of float, shape (G,)
    s1, s2 : ndarray, shape (G, p)
        Sums of ``x − shift`` and of its squares.
    shift : ndarray, shape (p,)
    count : ndarray, shape (G, p) or None
    """

    feature_ids: np.ndarray
    sizes: np.ndarray
    s1: np.ndarray
    s2: np.ndarray
    shift: np.ndarray | None = None
    count: np.ndarray | None = None

    def fold(self, x: np.ndarray, member: np.ndarray, mask: np.ndarray | None, done: np.ndarray) -> None:
        """Add a block ``x`` whose rows belong to the groups of the one-hot ``member`` (rows × G).

        ``mask`` marks missing cells (zeroed in ``x``); ``done`` is the one-hot of the rows folded
        before this block, summed per group (for the counts when the first missing cell appears).
        """
        if self.shift is None:
            first = x[0].copy()
            if mask is not None:
                first[mask[0]] = 0.0
            self.shift = first
        if mask is not None and self.count is None:
            self.count = np.repeat(done[:, None], x.shape[1], axis=1).astype(np.float64)
        shifted = x - self.shift
        if mask is not None:
            shifted[mask] = 0.0
            self.count += member.T @ (~mask).astype(np.float64)
        elif self.count is not None:
            self.count += member.sum(axis=0)[:, None]
        self.s1 += member.T @ shifted
        np.square(shifted, out=shifted)
        self.s2 += member.T @ shifted

    def moments(self, sl: slice = slice(None)) -> dict[str, np.ndarray]:
        """Group means, overall means, population variances and counts of features ``sl``."""
        s1, s2 = self.s1[:, sl], self.s2[:, sl]
        count = self.count[:, sl] if self.count is not None else np.repeat(self.sizes[:, None], s1.shape[1], axis=1)
        shift = self.shift[sl] if self.shift is not None else np.zeros(s1.shape[1])
        n = count.sum(axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            d_all = s1.sum(axis=0) / n
            var = np.maximum(s2.sum(axis=0) / n - d_all**2, 0.0)
            d_group = s1 / count
            var_group = np.maximum(s2 / count - d_group**2, 0.0)
        return {"group_mean": shift + d_group, "mean": shift + d_all, "variance": var, "group_sd":
                np.sqrt(var_group), "n_group": count, "n": n}


def _block_rows(source: MatrixSource, p: int, G: int, threads: int, memory_limit, n_all: int) -> int:
    """Rows per block so that the sums, a window of blocks and the results fit the budget."""
    limit = default_memory_limit() if memory_limit is None else parse_memory(memory_limit)
    held = process_baseline()
    budget = limit - held
    p_all = source.shape[1]
    # the sums (s1, s2, and counts when cells are missing) and a few length-p vectors
    accumulators = 8 * p * (3 * G + 4)
    # after the pass: z, p-values and adjusted p-values (G × p each) and one step's temporaries
    results = 8 * p * 3 * G + 8 * min(p, _STEP) * 8 * G
    row_bytes = p_all * source.dtype.itemsize * 2 + p * 8 * 3
    return window_block_rows(source, budget=budget, held=held, limit=limit, accumulators=accumulators,
                             results=results, row_bytes=row_bytes,
                             what=f"the profiles of {counted(p, 'feature')} in {counted(G, 'group')}")


def feature_group_sums(source: MatrixSource, labels: np.ndarray, *, rows: np.ndarray | None = None,
                       spec: PreprocessSpec | None = None, memory_limit=None, threads: int | None = None,
                       progress: Progress | None = None, runner: PassRunner | None = None) -> FeatureGroupSums:
    """Each group's sum and sum of squares of every feature of ``source``, in one streaming pass.

    Parameters
    ----------
    source : MatrixSource
        The fitted matrix.
    labels : ndarray of int, shape (n,)
        Group 1 … G of each active sample (rows ``rows`` of ``source``, in order).
    rows : ndarray of bool, shape (n_samples,), optional
        The active samples (default all).
    spec : PreprocessSpec, optional
        The fit's per-sample transforms (counts per ``T``, ``log(1 + x)``), replayed on
        every block; centring and scaling do not change a z-score and are not applied.
        Non-finite cells are an error unless ``spec.missing == "mean"``; then they are left
        out of their feature's sums and counts.
    memory_limit, threads, progress
        As for :func:`axiscope.fit`.
    runner : PassRunner, optional
        Records the pass (a new one by default).

    Returns
    -------
    FeatureGroupSums
    """
    spec = spec or PreprocessSpec()
    n_all, p = source.shape
    rows = np.ones(n_all, dtype=bool) if rows is None else np.asarray(rows, dtype=bool)
    labels = np.asarray(labels, dtype=np.int64)
    if labels.shape[0] != int(rows.sum()):
        raise InputError(f"{source.path}: {labels.shape[0]} grouped samples but {int(rows.sum())} selected rows; "
                         "use the same samples")
    G = int(labels.max())
    member_all = np.zeros((labels.shape[0], G))
    member_all[np.arange(labels.shape[0]), labels - 1] = 1.0
    threads = max(1, int(threads or os.cpu_count() or 1))
    block_rows = _block_rows(source, p, G, threads, memory_limit, n_all)
    spans = [(a, min(n_all, a + block_rows)) for a in range(0, n_all, block_rows)]
    spans = [(a, b) for a, b in spans if rows[a:b].any()]
    ids = np.asarray(source.sample_ids, dtype=object)[rows]
    sums = FeatureGroupSums(np.asarray(source.feature_ids, dtype=object), member_all.sum(axis=0),
                            np.zeros((G, p)), np.zeros((G, p)))

    def load(i: int) -> np.ndarray:
        a, b = spans[i]
        block = source.read_samples(a, b)
        return block if rows[a:b].all() else block[rows[a:b]]

    def task(block: np.ndarray):
        x = transform_block(block, spec).astype(np.float64, copy=False)
        return x, first_nonfinite(x)

    def fold(result, index: int, start: int) -> None:
        x, bad = result
        mask = None
        if bad is not None:
            if spec.missing != "mean":
                r, c = bad
                raise InputError(
                    f"{source.path}: sample {ids[start + r]!r}, feature {source.feature_ids[c]!r} is NaN or "
                    "infinite (after the transforms); fix the input or refit with missing cells filled "
                    "with the feature mean (missing='mean')")
            mask = ~np.isfinite(x)
            x = np.where(mask, 0.0, x)
        stop = start + x.shape[0]
        sums.fold(x, member_all[start:stop], mask, member_all[:start].sum(axis=0))

    counts = [int(rows[a:b].sum()) for a, b in spans]
    X = array_from_blocks(load, counts, p, source.dtype, f"groups-{id(source)}-{os.getpid()}")
    runner = runner or PassRunner(threads=threads, progress=progress)
    runner.run("group sums", "input", X, task, fold)
    return sums


PROFILE_COLUMNS = ["group", "side", "rank", "feature_id", "group_mean", "overall_mean", "group_sd",
                   "overall_sd", "z", "p_value", "p_adjusted"]


def feature_profiles(sums: FeatureGroupSums, *, top: int = DEFAULT_TOP_FEATURES) -> pd.DataFrame:
    """The ``top`` features with the largest and with the smallest z per group.

    Returns
    -------
    DataFrame
        Columns :data:`PROFILE_COLUMNS`; ``side`` is ``above`` (the group's mean is above the
        mean of all samples, largest z first) or ``below`` (smallest z first). Means are
        in the units after the fit's per-sample transforms. ``p_adjusted``: Benjamini–Hochberg
        over all features × groups with a z-score. Constant features have no z-score and are
        not listed.
    """
    G, p = sums.s1.shape
    z = np.empty((G, p))
    for lo in range(0, p, _STEP):
        sl = slice(lo, min(p, lo + _STEP))
        m = sums.moments(sl)
        z[:, sl] = mean_z(m["group_mean"], m["n_group"], m["mean"], m["variance"], m["n"])
    p_value = _two_sided(z)
    adjusted = benjamini_hochberg(p_value.ravel()).reshape(p_value.shape)
    constant = int(np.isnan(z).all(axis=0).sum())
    if constant:
        logger.info("%s constant over the samples (or too sparse) and left out of the group profiles",
                    counted(constant, "feature is", "features are"))
    rows = []
    for g in range(G):
        for side, sign in (("above", 1.0), ("below", -1.0)):
            key = np.where(np.isfinite(z[g]) & (sign * z[g] > 0), sign * z[g], -np.inf)
            n_top = min(top, int(np.isfinite(key).sum()))
            if not n_top:
                continue
            pick = np.argpartition(-key, n_top - 1)[:n_top] if n_top < p else np.arange(p)
            pick = pick[np.lexsort((pick, -key[pick]))][:n_top]
            m = sums.moments(pick)
            for rank, (j, col) in enumerate(zip(pick, range(pick.size)), start=1):
                rows.append((g + 1, side, rank, sums.feature_ids[j], m["group_mean"][g, col], m["mean"][col],
                             m["group_sd"][g, col], float(np.sqrt(m["variance"][col])), z[g, j], p_value[g, j],
                             adjusted[g, j]))
    return pd.DataFrame(rows, columns=PROFILE_COLUMNS)


# -------------------------------------------------------------------------- annotations


ANNOTATION_COLUMNS = ["group", "annotation", "treated_as", "category", "n_group", "group_value",
                      "overall_value", "expected", "z", "p_value", "p_adjusted"]


def annotation_profiles(annotations: "AnnotationSet", labels: np.ndarray) -> pd.DataFrame:
    """How each group differs from all samples in every annotation.

    Numeric annotations: ``group_value`` and ``overall_value`` are means over the samples
    with a value, ``n_group`` counts the group's members with a value, and ``z`` is
    :func:`mean_z` with its two-sided p-value. Categorical annotations: one row per group ×
    category, ``n_group`` members in the category, ``group_value`` and ``overall_value``
    their shares among the group's members and among all samples with a value,
    ``expected`` the count expected from the overall share, and ``p_value`` the
    hypergeometric upper tail ``P(X ≥ n_group)`` (scipy.stats.hypergeom.sf). ``p_adjusted``:
    Benjamini–Hochberg over all rows.
    """
    labels = np.asarray(labels, dtype=np.int64)
    G = int(labels.max())
    rows: list[tuple] = []
    for name, x in annotations.numeric.items():
        ok = np.isfinite(x)
        n, mean, var = int(ok.sum()), float(x[ok].mean()), float(x[ok].var())
        for g in range(1, G + 1):
            member = ok & (labels == g)
            n_g = int(member.sum())
            group_mean = float(x[member].mean()) if n_g else np.nan
            z = float(mean_z(group_mean, n_g, mean, var, n)) if n_g else np.nan
            rows.append((g, name, "numeric", "", n_g, group_mean, mean, np.nan, z,
                         float(_two_sided(z)) if np.isfinite(z) else np.nan, np.nan))
    for name, values in annotations.categorical.items():
        ok = np.array([v is not None for v in values], dtype=bool)
        total = int(ok.sum())
        categories = sorted(pd.unique(values[ok]), key=str)
        for g in range(1, G + 1):
            member = ok & (labels == g)
            n_g = int(member.sum())
            for category in categories:
                in_category = ok & (values == category)
                K = int(in_category.sum())
                k = int((member & in_category).sum())
                p = float(sps.hypergeom.sf(k - 1, total, K, n_g)) if n_g else np.nan
                rows.append((g, name, "categorical", str(category), k, k / n_g if n_g else np.nan, K / total,
                             n_g * K / total, np.nan, p, np.nan))
    table = pd.DataFrame(rows, columns=ANNOTATION_COLUMNS)
    if len(table):
        table["p_adjusted"] = benjamini_hochberg(table["p_value"].to_numpy(dtype=np.float64))
    return table


# ------------------------------------------------------------------------------ result


@dataclass
class SampleGroups:
    """Groups of samples and what sets each apart: the tables ``axiscope groups`` writes.

    Attributes
    ----------
    sample_ids : ndarray of str, shape (n,)
    labels : ndarray of int, shape (n,)
        Group 1 … G of each sample.
    axis_names : list of str
        The axes the groups were made on.
    grouping : Grouping
    summary : DataFrame
        One row per group: ``group``, ``n_samples``, ``share``, ``spread`` (root mean
        squared distance to the centre) and ``centre_<axis>`` per axis.
    members : DataFrame
        The most and least typical samples: ``group``, ``position`` (``nearest`` or
        ``farthest``), ``rank``, ``sample_id``, ``distance`` (to the group's centre).
    features : DataFrame or None
        :func:`feature_profiles` (None when the features were not profiled).
    annotations : DataFrame or None
        :func:`annotation_profiles` (None without annotations).
    manifest : dict
    """

    sample_ids: np.ndarray
    labels: np.ndarray
    axis_names: list[str]
    grouping: Grouping
    summary: pd.DataFrame
    members: pd.DataFrame
    features: pd.DataFrame | None
    annotations: pd.DataFrame | None
    manifest: dict = field(default_factory=dict)

    @property
    def n_groups(self) -> int:
        return self.grouping.n_groups

    def assignments(self) -> pd.DataFrame:
        """``sample_id`` and ``group`` of every sample, in the order of the fit."""
        return pd.DataFrame({"sample_id": self.sample_ids, "group": self.labels})

    def lines(self) -> list[str]:
        """One plain-language line per group (associations, not causes)."""
        return [describe_group(g, self) for g in range(1, self.n_groups + 1)]

    def write(self, directory: Path, *, parquet: bool = False) -> None:
        """Write the tables, ``groups.md`` and ``manifest.json`` into ``directory`` (made if missing).

        Files: ``assignments.tsv``, ``groups.tsv`` (the summary), ``group_counts.tsv``
        (the numbers of groups tried), ``group_members.tsv``, ``group_features.tsv`` and
        ``group_annotations.tsv`` (when computed), ``groups.md``, ``manifest.json``.
        """
        from ..io.output import write_json, write_table

        directory = Path(directory)
        directory.mkdir(parents=True, exist_ok=True)
        write_table(self.assignments(), directory / "assignments.tsv", parquet=parquet)
        write_table(self.summary, directory / "groups.tsv", parquet=parquet)
        write_table(self.grouping.candidates, directory / "group_counts.tsv", parquet=parquet)
        write_table(self.members, directory / "group_members.tsv", parquet=parquet)
        if self.features is not None:
            write_table(self.features, directory / "group_features.tsv", parquet=parquet)
        if self.annotations is not None:
            write_table(self.annotations, directory / "group_annotations.tsv", parquet=parquet)
        lines = self.lines()
        (directory / "groups.md").write_text(_markdown(self, lines), encoding="utf-8")
        write_json({**self.manifest, "lines": lines}, directory / "manifest.json")


def _markdown(result: SampleGroups, lines: list[str]) -> str:
    g = result.grouping
    head = [f"# {counted(g.n_groups, 'group')} of samples", "",
            f"Made by {'Ward' if g.method == 'ward' else 'k-means'} on the scores of "
            f"{', '.join(result.axis_names)}; number of groups: {g.chosen_by}.", ""]
    return "\n".join(head + [f"- {line}" for line in lines]) + "\n"


def describe_group(g: int, result: SampleGroups, *, n_features: int = 3) -> str:
    """One line about group ``g``: size, where it sits on the axes, its leading features and categories."""
    row = result.summary[result.summary["group"] == g].iloc[0]
    parts = [f"Group {g}: {counted(int(row['n_samples']), 'sample')} ({100 * row['share']:.0f}%)"]
    sd = result.manifest.get("axis_sd", {})
    placed = []
    for axis in result.axis_names:
        spread = sd.get(axis)
        centre = float(row[f"centre_{axis}"])
        if spread and np.isfinite(centre) and abs(centre) >= 0.5 * spread:
            placed.append((abs(centre) / spread, axis, centre / spread))
    placed.sort(reverse=True)
    if placed:
        parts.append("sits " + " and ".join(f"{'high' if c > 0 else 'low'} on {axis} ({c:+.1f} SD)"
                                            for _, axis, c in placed[:2]))
    features = result.features
    if features is not None and len(features):
        mine = features[(features["group"] == g) & (features["p_adjusted"] < ALPHA)]
        for side, word in (("above", "higher"), ("below", "lower")):
            ids = [str(f) for f in mine[mine["side"] == side]["feature_id"].head(n_features)]
            if ids:
                parts.append(f"{word} than elsewhere: {', '.join(ids)}")
    annotations = result.annotations
    if annotations is not None and len(annotations):
        mine = annotations[(annotations["group"] == g) & (annotations["p_adjusted"] < ALPHA)]
        cats = mine[(mine["treated_as"] == "categorical") & (mine["group_value"] > mine["overall_value"])]
        if len(cats):
            best = cats.sort_values(["p_value", "group_value"], ascending=[True, False], kind="stable").iloc[0]
            parts.append(f"mostly {best['annotation']} = {best['category']} ({100 * best['group_value']:.0f}% "
                         f"of the group, {100 * best['overall_value']:.0f}% of all samples)")
        nums = mine[mine["treated_as"] == "numeric"].sort_values("p_value", kind="stable")
        if len(nums):
            best = nums.iloc[0]
            parts.append(f"{best['annotation']} {'higher' if best['z'] > 0 else 'lower'} than elsewhere "
                         f"(mean {best['group_value']:.3g} vs {best['overall_value']:.3g})")
    return "; ".join(parts) + "."


# ------------------------------------------------------------------------- entry point


@dataclass
class _Fit:
    directory: Path | None
    sample_ids: np.ndarray
    scores: np.ndarray
    axis_names: list[str]
    spec: PreprocessSpec
    manifest: dict


def _read_fit(source: "FitResult | str | os.PathLike") -> _Fit:
    """Scores, axis names, preprocessing and manifest of a fit (a FitResult or its result directory)."""
    if not isinstance(source, (str, os.PathLike)):
        return _Fit(None, np.asarray(source.sample_ids, dtype=object), np.asarray(source.scores, dtype=np.float64),
                    list(source.axis_names), source.model.spec, dict(source.manifest))
    directory = Path(source)
    if not directory.is_dir():
        raise InputError(f"{directory}: no such result directory; pass the output directory of 'axiscope fit'")
    for required in ("manifest.json", "sample_scores.tsv"):
        if not (directory / required).is_file():
            raise InputError(f"{directory}: not an axiscope fit result ({required} is missing); "
                             "pass the output directory of 'axiscope fit'")
    try:
        manifest = json.loads((directory / "manifest.json").read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise InputError(f"{directory / 'manifest.json'}: unreadable ({exc.__class__.__name__}); refit or "
                         "restore the result") from exc
    if not isinstance(manifest, dict):
        raise InputError(f"{directory / 'manifest.json'}: not an axiscope manifest; refit or restore the result")
    model = load_model(directory / "model")
    table = read_result_table(directory / "sample_scores.tsv", required=["sample_id"] + model.axis_names,
                              numeric=model.axis_names)
    scores = table[model.axis_names].to_numpy(dtype=np.float64)
    if scores.shape[0] != model.n_samples:
        raise InputError(f"{directory / 'sample_scores.tsv'}: {scores.shape[0]} samples, but the model was fitted "
                         f"on {model.n_samples}; the directory mixes results of different fits, refit")
    if not np.isfinite(scores).all():
        raise InputError(f"{directory / 'sample_scores.tsv'}: holds missing or non-finite scores; restore the file "
                         "written by 'axiscope fit' or refit")
    return _Fit(directory, table["sample_id"].to_numpy(dtype=object), scores, model.axis_names, model.spec, manifest)


def _open_fitted_matrix(fitted: _Fit, matrix, layout: dict) -> MatrixSource:
    """The matrix of the fit: ``matrix`` if given, else the input named in the fit's manifest."""
    from ..io.formats import open_matrix

    if matrix is not None:
        return open_matrix(matrix, **layout)
    recorded = fitted.manifest.get("input") or {}
    path = recorded.get("path")
    if not path or not Path(path).exists():
        raise InputError(f"{path or 'the fit'}: the fitted matrix is not there; pass its path as matrix=... "
                         "(or features=False to group without feature profiles)")
    return open_matrix(path, dataset=layout.get("dataset") or recorded.get("dataset"),
                       samples_in=layout.get("samples_in") or recorded.get("samples_in", "rows"),
                       **{k: v for k, v in layout.items() if k not in ("dataset", "samples_in") and v is not None})


def _active_rows(source: MatrixSource, sample_ids: np.ndarray) -> np.ndarray:
    """The rows of ``source`` holding the fit's samples, checked to be in the fit's order."""
    ids = pd.Index(np.asarray(source.sample_ids, dtype=object))
    position = ids.get_indexer(pd.Index(sample_ids))
    if (position < 0).any():
        missing = sample_ids[position < 0]
        raise InputError(f"{source.path}: {counted(int(missing.size), 'sample')} of the fit "
                         f"{'is' if missing.size == 1 else 'are'} not in this matrix (e.g. {missing[0]!r}); pass "
                         "the fitted matrix and its ids (matrix=..., sample_ids=...)")
    if np.any(np.diff(position) <= 0):
        raise InputError(f"{source.path}: the fit's samples are in another order in this matrix; pass the fitted "
                         "matrix")
    rows = np.zeros(len(ids), dtype=bool)
    rows[position] = True
    return rows


def _summary(scores: np.ndarray, labels: np.ndarray,
             axis_names: list[str]) -> tuple[pd.DataFrame, np.ndarray, np.ndarray]:
    """Per-group size, share, spread and centre; nearest and farthest samples; distances to own centre."""
    G = int(labels.max())
    n = scores.shape[0]
    centres = np.vstack([scores[labels == g].mean(axis=0) for g in range(1, G + 1)])
    distance = np.sqrt(((scores - centres[labels - 1]) ** 2).sum(axis=1))
    rows = []
    for g in range(1, G + 1):
        member = labels == g
        rows.append([g, int(member.sum()), member.sum() / n, float(np.sqrt(np.mean(distance[member] ** 2))),
                     *centres[g - 1]])
    summary = pd.DataFrame(rows, columns=["group", "n_samples", "share", "spread",
                                          *[f"centre_{a}" for a in axis_names]])
    return summary, centres, distance


def _members(sample_ids: np.ndarray, labels: np.ndarray, distance: np.ndarray, per_list: int) -> pd.DataFrame:
    rows = []
    for g in range(1, int(labels.max()) + 1):
        index = np.flatnonzero(labels == g)
        order = index[np.lexsort((index, distance[index]))]
        for position, picked in (("nearest", order[:per_list]), ("farthest", order[::-1][:per_list])):
            for rank, i in enumerate(picked, start=1):
                rows.append((g, position, rank, sample_ids[i], distance[i]))
    return pd.DataFrame(rows, columns=["group", "position", "rank", "sample_id", "distance"])


def find_groups(
    source: "FitResult | str | os.PathLike",
    *,
    n_axes: int | None = None,
    n_groups: int | str = "auto",
    method: str = "auto",
    max_groups: int = DEFAULT_MAX_GROUPS,
    features: bool = True,
    matrix: MatrixSource | str | os.PathLike | None = None,
    dataset: str | None = None,
    sample_ids: str | None = None,
    feature_ids: str | None = None,
    samples_in: str | None = None,
    annotations: "str | os.PathLike | pd.DataFrame | AnnotationSet | None" = None,
    id_column: str = "sample_id",
    categorical: Iterable[str] | str | None = None,
    numeric: Iterable[str] | str | None = None,
    ignore: Iterable[str] | str | None = None,
    allow_missing: bool = False,
    top: int = DEFAULT_TOP_FEATURES,
    samples_per_list: int = SAMPLES_PER_LIST,
    seed: int = 0,
    memory_limit: int | str | None = None,
    threads: int | None = None,
    progress: Progress | None = None,
) -> SampleGroups:
    """Groups of the samples of a fit, and what characterises each (see the module description).

    Parameters
    ----------
    source : FitResult or path
        A fit, or the output directory of ``axiscope fit``.
    n_axes : int, optional
        Group on the first ``n_axes`` scores (default: every axis the fit kept).
    n_groups : int or "auto", default="auto"
    method : {"auto", "ward", "k-means"}, default="auto"
    max_groups : int, default=DEFAULT_MAX_GROUPS
        Largest number of groups tried by ``auto``.
    features : bool, default=True
        Profile the groups by the features of the matrix (one streaming pass).
    matrix : MatrixSource or path, optional
        The fitted matrix (default: the input recorded in the fit's manifest, opened with
        its recorded dataset and orientation). It must hold the fit's samples, in order.
    dataset, sample_ids, feature_ids, samples_in
        How to open ``matrix`` (see :func:`axiscope.io.open_matrix`).
    annotations : path, DataFrame or AnnotationSet, optional
        Sample annotations for the annotation profiles.
    id_column, categorical, numeric, ignore, allow_missing
        See :func:`axiscope.explain.annotations.load_annotations`.
    top : int, default=DEFAULT_TOP_FEATURES
        Features listed per group and side.
    samples_per_list : int, default=SAMPLES_PER_LIST
        Most and least typical samples listed per group.
    seed : int, default=0
        Seed of k-means and of the silhouette's subset.
    memory_limit, threads, progress
        As for :func:`axiscope.fit`.

    Returns
    -------
    SampleGroups

    Raises
    ------
    InputError
        The result directory holds no scores, or the matrix does not hold the fit's samples.
    OptionError
        More axes than the fit kept, more groups than samples, an unknown method.
    """
    started = time.perf_counter()
    fitted = _read_fit(source)
    _check_counts(top, samples_per_list)
    k = len(fitted.axis_names)
    if n_axes is None:
        n_axes = k
    if isinstance(n_axes, bool) or not isinstance(n_axes, (int, np.integer)) or n_axes < 1:
        raise OptionError(f"n_axes={n_axes!r} is not a whole number >= 1; pass e.g. {min(3, k)}")
    where = f" in {fitted.directory}" if fitted.directory is not None else ""
    if n_axes > k:
        raise OptionError(f"n_axes={n_axes} is more than the {counted(k, 'axis', 'axes')} of the fit{where}; "
                          f"ask for at most {k}")
    axes = fitted.axis_names[:n_axes]
    scores = fitted.scores[:, :n_axes]
    n = scores.shape[0]
    requested = _check_n_groups(n_groups, n)
    _resolve_method(method, n)
    ann = _annotations(annotations, fitted.sample_ids, id_column=id_column, categorical=categorical,
                       numeric=numeric, ignore=ignore, allow_missing=allow_missing)
    runner = PassRunner(threads=max(1, int(threads or os.cpu_count() or 1)), progress=progress)
    src = None
    if features:  # open and check the matrix before the clustering, so that errors come first
        layout = {"dataset": dataset, "sample_ids": sample_ids, "feature_ids": feature_ids}
        if samples_in is not None:
            layout["samples_in"] = samples_in
        src = matrix if isinstance(matrix, MatrixSource) else _open_fitted_matrix(fitted, matrix, layout)
    try:
        rows = _active_rows(src, fitted.sample_ids) if src is not None else None
        grouping = group_samples(scores, n_groups, method=method, max_groups=max_groups, seed=seed)
        labels = grouping.labels
        profiles = None
        if src is not None:
            sums = feature_group_sums(src, labels, rows=rows, spec=fitted.spec, memory_limit=memory_limit,
                                      threads=threads, progress=progress, runner=runner)
            profiles = feature_profiles(sums, top=top)
        matrix_path = str(src.path) if src is not None else None
    finally:
        if src is not None and src is not matrix:
            src.close()
    summary, _, distance = _summary(scores, labels, axes)
    members = _members(fitted.sample_ids, labels, distance, samples_per_list)
    annotation_table = annotation_profiles(ann, labels) if ann is not None else None
    from .. import __version__

    manifest: dict[str, Any] = {
        "axiscope_version": __version__,
        "result_dir": str(fitted.directory) if fitted.directory is not None else None,
        "matrix": matrix_path,
        "axes": axes,
        "axis_sd": {a: float(s) for a, s in zip(axes, scores.std(axis=0))},
        "n_samples": n,
        "method": grouping.method,
        "n_groups": grouping.n_groups,
        "n_groups_requested": "auto" if requested is None else requested,
        "chosen_by": grouping.chosen_by,
        "max_groups": int(max_groups),
        "seed": int(seed),
        "features_profiled": src is not None,
        "annotations": (str(annotations) if isinstance(annotations, (str, os.PathLike)) else None),
        "passes": {"count": runner.n_passes, "detail": [
            {"name": r.name, "read_from": r.source, "seconds": round(r.seconds, 3), "blocks": r.n_blocks}
            for r in runner.records]},
        "seconds": round(time.perf_counter() - started, 3),
    }
    return SampleGroups(fitted.sample_ids, labels, axes, grouping, summary, members, profiles, annotation_table,
                        manifest)


def _check_counts(top: int, samples_per_list: int) -> None:
    for name, value in (("top", top), ("samples_per_list", samples_per_list)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
            raise OptionError(f"{name}={value!r} is not a whole number >= 1; pass e.g. 10")


def _annotations(annotations, sample_ids: np.ndarray, **options) -> "AnnotationSet | None":
    from ..explain.annotations import AnnotationSet, load_annotations

    if annotations is None:
        return None
    if isinstance(annotations, AnnotationSet):
        return annotations.take(sample_ids)
    return load_annotations(annotations, sample_ids, **options)
