"""What a fit produced: the model, per-sample results, and the tables people use."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ..core.engine import Factorization
from ..core.preprocess import FeatureStatistics, Preprocessing
from ..defaults import DEFAULT_TOP_FEATURES
from ..model.statistics import feature_statistics
from ..model.store import Model

__all__ = ["FitResult"]


@dataclass
class FitResult:
    """What a fit produced: the model, per-sample results and a record of the run.

    Attributes
    ----------
    model : Model
    sample_ids : ndarray of str, shape (n,)
        Ids of the active samples, in input order.
    scores : ndarray, shape (n, k)
        Principal component scores of the active samples.
    sample_sq_dist : ndarray, shape (n,)
        Squared distance of each sample to the centre in the preprocessed space.
    factorization : Factorization
    preprocessing : Preprocessing
    statistics : FeatureStatistics
        Statistics of every input feature (before selection).
    input_feature_ids : ndarray of str
    manifest : dict
        Settings, sizes, passes over the data, timings and accuracy of the run. Its
        ``accuracy`` record lists, per axis, the estimated relative error of the singular
        value, the sine of the angle between the loading vector and the exact one, the
        relative gap to the neighbouring variance, and whether the value is within the
        requested ``tol``.
    """

    model: Model
    sample_ids: np.ndarray
    scores: np.ndarray
    sample_sq_dist: np.ndarray
    factorization: Factorization
    preprocessing: Preprocessing
    statistics: FeatureStatistics
    input_feature_ids: np.ndarray
    manifest: dict = field(default_factory=dict)

    @property
    def axis_names(self) -> list[str]:
        return self.model.axis_names

    def components_table(self) -> pd.DataFrame:
        """One row per axis: singular value, variance (s²/n), variance ratio, cumulative ratio."""
        m = self.model
        ratio = m.variance_ratio
        return pd.DataFrame(
            {
                "axis": m.axis_names,
                "singular_value": m.singular_values,
                "variance": m.variance,
                "variance_ratio": ratio,
                "cumulative_ratio": np.cumsum(ratio),
            }
        )

    def sample_scores(self) -> pd.DataFrame:
        df = pd.DataFrame(self.scores, columns=self.axis_names)
        df.insert(0, "sample_id", self.sample_ids)
        return df

    def feature_loadings(self) -> pd.DataFrame:
        df = pd.DataFrame(self.model.components, columns=self.axis_names)
        df.insert(0, "feature_id", self.model.feature_ids)
        return df

    def top_features(self, n: int = DEFAULT_TOP_FEATURES) -> pd.DataFrame:
        """The ``n`` features with the largest positive and negative loadings on each axis.

        Columns: axis, side (``positive`` or ``negative``), rank, feature_id, loading,
        correlation (between the feature and the scores) and contribution_pct (percent of the
        axis, ``100·loading²``); see :func:`axiscope.model.statistics.feature_statistics`.
        """
        stats = feature_statistics(self.model)
        V = self.model.components
        ids = np.asarray(self.model.feature_ids)
        rows = []
        n = min(n, V.shape[0])
        for j, axis in enumerate(self.axis_names):
            order = np.argsort(V[:, j], kind="stable")
            for side, idx in (("positive", order[::-1][:n]), ("negative", order[:n])):
                for rank, i in enumerate(idx, start=1):
                    if (V[i, j] > 0) != (side == "positive"):
                        break
                    rows.append((axis, side, rank, ids[i], V[i, j], stats.correlation[i, j],
                                 stats.contribution[i, j]))
        return pd.DataFrame(rows, columns=["axis", "side", "rank", "feature_id", "loading",
                                           "correlation", "contribution_pct"])

    def write(self, directory: Path, *, top: int = DEFAULT_TOP_FEATURES, parquet: bool = False,
              command_line: list[str] | None = None) -> None:
        """Write the tables, the model and the manifest into ``directory`` (made if missing).

        Parameters
        ----------
        directory : path
        top : int, default=DEFAULT_TOP_FEATURES
            Features listed per side of each axis in ``top_features.tsv``.
        parquet : bool, default=False
            Also write every table as Parquet beside its TSV.
        command_line : list of str, optional
            Recorded in the manifest.

        Callers wanting atomic output wrap this in :func:`axiscope.io.output.atomic_directory`.
        """
        from ..io.output import (
            ZARR_FEATURE_THRESHOLD,
            write_json,
            write_table,
            write_zarr_matrix,
        )

        directory = Path(directory)
        directory.mkdir(parents=True, exist_ok=True)
        write_table(self.components_table(), directory / "components.tsv", parquet=parquet)
        write_table(self.sample_scores(), directory / "sample_scores.tsv", parquet=parquet)
        loadings = self.feature_loadings()
        write_table(loadings, directory / "feature_loadings.tsv", parquet=parquet)
        if loadings.shape[0] > ZARR_FEATURE_THRESHOLD:
            write_zarr_matrix(directory / "feature_loadings.zarr", self.model.components,
                              self.model.feature_ids, self.axis_names)
        write_table(self.top_features(top), directory / "top_features.tsv", parquet=parquet)
        dropped = np.setdiff1d(np.arange(self.input_feature_ids.shape[0]), self.preprocessing.kept)
        if dropped.size:
            write_table(self.dropped_features(), directory / "dropped_features.tsv", parquet=parquet)
        self.model.save(directory / "model")
        manifest = dict(self.manifest)
        if command_line is not None:
            manifest["command_line"] = command_line
        write_json(manifest, directory / "manifest.json")

    def first_axes(self, r: int) -> "FitResult":
        """The same fit with only its first ``r`` axes, every table consistent.

        Scores, loadings, singular values and the per-axis accuracy are cut; what depends on
        the number of axes is recomputed without the data: the training residual moments and
        shrinkage factors kept for scoring (:func:`axiscope.model.training.training_extras`)
        and the subspace error bound, ``min(1, √Σ sin²θ_j)`` over the kept axes (the sine of
        the largest angle of a span is at most the Frobenius norm of the vectors' residuals).
        The manifest records ``n_components`` = ``r`` and ``n_components_fitted``.
        """
        from dataclasses import replace

        from ..model.training import training_extras

        k = self.model.n_components
        if not (1 <= int(r) <= k):
            raise ValueError(f"r={r} is not between 1 and the {k} fitted axes")
        r = int(r)
        if r == k:
            return self
        m, fac = self.model, self.factorization
        s = m.singular_values[:r]
        scores = self.scores[:, :r]
        extras = dict(m.extras)
        extras.update(training_extras(s, scores, self.sample_sq_dist, total_inertia=m.total_inertia,
                                      n_features=m.n_features))
        model = replace(m, components=m.components[:, :r], singular_values=s, extras=extras)
        accuracy = fac.accuracy
        if accuracy is not None:
            accuracy = replace(accuracy, singular_value=accuracy.singular_value[:r], vector=accuracy.vector[:r],
                               relative_gap=accuracy.relative_gap[:r],
                               subspace=float(min(1.0, np.sqrt(np.sum(accuracy.vector[:r] ** 2)))))
        fac = replace(fac, singular_values=fac.singular_values[:r], components=fac.components[:, :r],
                      scores=fac.scores[:, :r], accuracy=accuracy)
        manifest = dict(self.manifest)
        if "options" in manifest:
            manifest["options"] = {**manifest["options"], "n_components": r}
        manifest["n_components_fitted"] = k
        record = manifest.get("accuracy")
        if record and accuracy is not None:
            axes = record["axes"][:r]
            manifest["accuracy"] = {**record, "axes": axes, "all_below_tol": all(a["below_tol"] for a in axes),
                                    "max_singular_value_error": float(np.max(accuracy.singular_value)),
                                    "subspace_error": float(accuracy.subspace)}
        return replace(self, model=model, scores=scores, factorization=fac, manifest=manifest)

    def dropped_features(self) -> pd.DataFrame:
        """Features left out of the axes, with the reason (``supplementary``, ``constant`` or
        ``filtered``) and their statistics."""
        stats, prep = self.statistics, self.preprocessing
        dropped = np.setdiff1d(np.arange(self.input_feature_ids.shape[0]), prep.kept)
        return pd.DataFrame(
            {
                "feature_id": self.input_feature_ids[dropped],
                "reason": prep.reason[dropped].astype(str),
                "mean": stats.mean[dropped],
                "variance": stats.variance[dropped],
            }
        )
