"""Shared fixtures: matrix writers for every input format, and planted test matrices.

Everything here is generic so that any test module can use it:

* ``write_matrix(X, fmt, ...)`` writes a logical samples × features matrix to ``tmp_path``
  as HDF5, Zarr (format 2 or 3), ``.npy`` or delimited text, with a chosen on-disk
  chunking and orientation (samples in rows or in columns), optionally with id datasets.
* ``planted(n, p, ...)`` builds a low-rank + noise matrix whose truth (the planted
  singular values and subspaces) is returned with it.
* ``dense_reference(X, ...)`` is the textbook dense computation (numpy/LAPACK) of the
  preprocessed matrix and its SVD, used as the outside reference by several modules.
* ``client``: a ``dask.distributed`` client of a two-worker local cluster, per session.

The data are invented (random numbers with a planted structure); the references are
LAPACK via numpy and the formulas written next to each computation.
"""

from __future__ import annotations

import gzip
import pathlib
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pytest

FORMATS = ("h5", "zarr2", "zarr3", "npy", "tsv", "csv", "tsv.gz")


@pytest.fixture(autouse=True, scope="session")
def _single_threaded_blas():
    """Run BLAS single-threaded during the tests.

    The engine runs blocks on Dask threads (and limits BLAS itself only when ``threads > 1``);
    the dense references here run on the main thread. On a busy 2-core machine OpenBLAS's
    own threads spun against other work and small fits took 30–80× longer (measured: 4 s
    instead of 0.05 s). Results do not depend on this; only the suite's speed does.
    """
    import scipy.linalg  # noqa: F401  (loads scipy's BLAS so that the limit applies to it too)
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        yield


# ----------------------------------------------------------------------------- cluster


@pytest.fixture(scope="session")
def client():
    """A client of a LocalCluster of two single-threaded worker processes (127.0.0.1, no
    dashboard, the scheduler's HTTP server on a free port), one for the whole session (each
    start costs seconds); skips when ``distributed`` is not installed."""
    distributed = pytest.importorskip("distributed")
    from axiscope.core.backends import QUIET_HTTP

    cluster = distributed.LocalCluster(processes=True, n_workers=2, threads_per_worker=1, host="127.0.0.1",
                                       **QUIET_HTTP)
    client = distributed.Client(cluster, set_as_default=False)
    yield client
    client.close()
    cluster.close()


# ------------------------------------------------------------------------------ writers


def _ids(prefix: str, n: int) -> np.ndarray:
    return np.array([f"{prefix}{i:05d}" for i in range(n)])


def write_matrix_file(
    path: pathlib.Path,
    X: np.ndarray,
    fmt: str,
    *,
    chunks: tuple[int, int] | None = None,
    samples_in: str = "rows",
    sample_ids: np.ndarray | list[str] | None = None,
    feature_ids: np.ndarray | list[str] | None = None,
    dataset: str = "X",
) -> pathlib.Path:
    """Write the logical matrix ``X`` (samples × features) to ``path`` in format ``fmt``.

    ``chunks`` is the on-disk chunk shape in *file* orientation (HDF5/Zarr only; default
    contiguous for HDF5 and one chunk per 64 rows for Zarr). With ``samples_in="columns"``
    the file holds ``X.T``. For HDF5/Zarr, ids given are stored as 1-D string datasets
    ``sample_ids``/``feature_ids`` beside the matrix (the readers' default names); text
    files always carry ids (generated ``s00000``/``f00000`` when not given).
    """
    X = np.asarray(X)
    stored = X if samples_in == "rows" else np.ascontiguousarray(X.T)
    if fmt == "h5":
        import h5py

        with h5py.File(path, "w") as handle:
            handle.create_dataset(dataset, data=stored, chunks=chunks)
            if sample_ids is not None:
                handle.create_dataset("sample_ids", data=np.asarray(sample_ids, dtype="S"))
            if feature_ids is not None:
                handle.create_dataset("feature_ids", data=np.asarray(feature_ids, dtype="S"))
    elif fmt in ("zarr2", "zarr3"):
        import zarr

        group = zarr.open_group(str(path), mode="w", zarr_format=int(fmt[-1]))
        chunks = chunks or (min(64, stored.shape[0]), stored.shape[1])
        array = group.create_array(dataset, shape=stored.shape, chunks=chunks, dtype=stored.dtype)
        array[...] = stored
        for name, values in (("sample_ids", sample_ids), ("feature_ids", feature_ids)):
            if values is not None:
                values = np.asarray(values, dtype=str)
                ids = group.create_array(name, shape=values.shape, dtype=str)
                ids[...] = values
    elif fmt == "npy":
        np.save(path, stored)
    elif fmt in ("tsv", "csv", "tsv.gz", "csv.gz"):
        delimiter = "," if fmt.startswith("csv") else "\t"
        s_ids = _ids("s", X.shape[0]) if sample_ids is None else np.asarray(sample_ids, dtype=str)
        f_ids = _ids("f", X.shape[1]) if feature_ids is None else np.asarray(feature_ids, dtype=str)
        row_ids, col_ids = (s_ids, f_ids) if samples_in == "rows" else (f_ids, s_ids)
        lines = [delimiter.join(["id", *col_ids])]
        lines += [delimiter.join([rid, *(repr(float(v)) for v in row)]) for rid, row in zip(row_ids, stored)]
        text = "\n".join(lines) + "\n"
        if fmt.endswith(".gz"):
            with gzip.open(path, "wt", encoding="utf-8") as handle:
                handle.write(text)
        else:
            path.write_text(text, encoding="utf-8")
    else:  # pragma: no cover - a typo in a test
        raise ValueError(f"unknown test format {fmt!r}")
    return path


_SUFFIX = {"h5": ".h5", "zarr2": ".zarr", "zarr3": ".zarr", "npy": ".npy", "tsv": ".tsv",
           "csv": ".csv", "tsv.gz": ".tsv.gz", "csv.gz": ".csv.gz"}


@pytest.fixture
def write_matrix(tmp_path: pathlib.Path) -> Callable[..., pathlib.Path]:
    """Factory writing a matrix into ``tmp_path``; see :func:`write_matrix_file`.

    Call as ``write_matrix(X, "zarr3", chunks=(50, 40), samples_in="columns", name="m")``;
    returns the path (file or Zarr directory). ``name`` defaults to a fresh unique stem.
    """
    counter = {"n": 0}

    def write(X: np.ndarray, fmt: str, *, name: str | None = None, directory: pathlib.Path | None = None,
              **options) -> pathlib.Path:
        counter["n"] += 1
        stem = name or f"matrix{counter['n']}"
        folder = directory or tmp_path
        folder.mkdir(parents=True, exist_ok=True)
        return write_matrix_file(folder / f"{stem}{_SUFFIX[fmt]}", X, fmt, **options)

    return write


# -------------------------------------------------------------------- planted matrices


@dataclass
class Planted:
    """A low-rank + noise matrix and the structure planted in it.

    ``X = U·diag(s)·Vᵀ + noise·G`` with orthonormal ``U`` (n × r), ``V`` (p × r) and
    Gaussian ``G``; ``offset`` (p,) is added to every row so that centring matters.
    """

    X: np.ndarray
    U: np.ndarray
    s: np.ndarray
    V: np.ndarray
    noise: float
    offset: np.ndarray


def make_planted(
    n: int,
    p: int,
    *,
    rank: int = 10,
    spectrum: np.ndarray | str = "linear",
    noise: float = 1.0,
    offset: float = 5.0,
    dtype: str | np.dtype = "float64",
    seed: int = 0,
) -> Planted:
    """Planted low-rank + noise matrix.

    ``spectrum`` is an array of ``rank`` singular values, or ``"linear"`` (from 30·√n
    down to 10·√n, well above the noise edge ``noise·(√n + √p)``), or ``"slow"``
    (``s_j = 20·√n·j^-1/2``: a slowly decaying spectrum with small relative gaps).
    """
    rng = np.random.default_rng(seed)
    U, _ = np.linalg.qr(rng.standard_normal((n, rank)))
    V, _ = np.linalg.qr(rng.standard_normal((p, rank)))
    if isinstance(spectrum, str):
        if spectrum == "linear":
            s = np.linspace(30.0, 10.0, rank) * np.sqrt(n)
        elif spectrum == "slow":
            s = 20.0 * np.sqrt(n) * np.arange(1, rank + 1) ** -0.5
        else:  # pragma: no cover
            raise ValueError(spectrum)
    else:
        s = np.asarray(spectrum, dtype=float)
    shift = offset * rng.standard_normal(p)
    X = (U * s) @ V.T + noise * rng.standard_normal((n, p)) + shift
    return Planted(X.astype(dtype), U, s, V, noise, shift)


@pytest.fixture(scope="session")
def planted() -> Callable[..., Planted]:
    """Factory for :func:`make_planted` (same keyword arguments)."""
    return make_planted


# ------------------------------------------------------------------- dense references


@dataclass
class DenseReference:
    """Dense preprocessing + LAPACK SVD of a small matrix (the outside reference)."""

    Z: np.ndarray  # preprocessed matrix (n × p_kept), float64
    kept: np.ndarray  # indices of the kept features
    U: np.ndarray
    s: np.ndarray
    Vt: np.ndarray

    def scores(self, k: int) -> np.ndarray:
        return self.U[:, :k] * self.s[:k]

    def components(self, k: int) -> np.ndarray:
        return self.Vt[:k].T

    def variance(self, k: int | None = None) -> np.ndarray:
        n = self.Z.shape[0]
        return (self.s if k is None else self.s[:k]) ** 2 / n


def dense_reference(
    X: np.ndarray,
    *,
    scale: str = "unit",
    center: bool = True,
    log_transform: bool = False,
    counts_per: float | None = None,
    keep: np.ndarray | None = None,
) -> DenseReference:
    """Preprocess ``X`` densely in float64 and take its SVD with LAPACK (numpy.linalg.svd).

    Formulas (written from the definitions, independent of the library): counts per
    ``T`` ``x_ij·T/Σ_j x_ij``; ``log(1 + x)``; centring by the column mean; ``unit`` scaling
    by the population SD ``sqrt(Σ(x−x̄)²/n)``; ``allele-frequency`` scaling by ``sqrt(2q(1−q))``,
    ``q = x̄/2`` (Patterson, Price & Reich 2006, doi:10.1371/journal.pgen.0020190).
    Features with zero variance are dropped unless ``keep`` (indices) is given.
    """
    A = np.asarray(X, dtype=np.float64).copy()
    if counts_per is not None:
        A = A * (counts_per / A.sum(axis=1, keepdims=True))
    if log_transform:
        A = np.log1p(A)
    mean = A.mean(axis=0)
    sd = A.std(axis=0, ddof=0)  # population SD (1/n)
    if keep is None:
        keep = np.flatnonzero(sd > 0)
    A, mean, sd = A[:, keep], mean[keep], sd[keep]
    if center:
        A = A - mean
    if scale == "unit":
        A = A / sd
    elif scale == "allele-frequency":
        q = mean / 2.0
        A = A / np.sqrt(2.0 * q * (1.0 - q))
    U, s, Vt = np.linalg.svd(A, full_matrices=False)  # reference: LAPACK gesdd via numpy
    return DenseReference(A, np.asarray(keep), U, s, Vt)


def orient_like_convention(components: np.ndarray, scores: np.ndarray | None = None):
    """Apply the documented sign convention to reference factors (copies).

    Each axis is flipped so that the feature with the largest absolute loading is positive.
    """
    V = np.array(components, dtype=np.float64, copy=True)
    idx = np.argmax(np.abs(V), axis=0)
    signs = np.sign(V[idx, np.arange(V.shape[1])])
    signs[signs == 0] = 1.0
    V *= signs
    if scores is None:
        return V
    return V, np.asarray(scores, dtype=np.float64) * signs


def max_sine(A: np.ndarray, B: np.ndarray) -> float:
    """Largest principal-angle sine between the column spaces of A and B.

    Reference: scipy.linalg.subspace_angles (Knyazev & Argentati 2002).
    """
    import scipy.linalg

    return float(np.max(np.sin(scipy.linalg.subspace_angles(A, B))))


@pytest.fixture(scope="session")
def dense() -> Callable[..., DenseReference]:
    """Factory for :func:`dense_reference`."""
    return dense_reference


@pytest.fixture(scope="session")
def orient() -> Callable:
    """The documented sign convention applied to reference factors."""
    return orient_like_convention


@pytest.fixture(scope="session")
def sine() -> Callable[[np.ndarray, np.ndarray], float]:
    """Largest principal-angle sine between two column spaces (scipy.linalg.subspace_angles)."""
    return max_sine
