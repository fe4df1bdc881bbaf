"""Option objects of a fit: how to factorise, with which resources, and how to read the input.

Each is a frozen dataclass that checks its values when it is made, so a wrong value fails
before any data are read, with a message that names the Python parameter (the command
line translates parameter names into its option spellings). Preprocessing has its own
object, :class:`axiscope.core.preprocess.PreprocessSpec`.
"""

from __future__ import annotations

import numbers
import os
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import OptionError
from .memory import default_memory_limit, parse_memory

__all__ = ["METHODS", "MAX_POWER_ITERATIONS", "EngineSettings", "Resources", "InputLayout"]

#: Ways of computing the factorisation.
METHODS = ("auto", "randomized", "exact", "one-pass")
#: Largest fixed number of power iterations accepted.
MAX_POWER_ITERATIONS = 100
#: Orientations of the matrix in its file.
SAMPLES_IN = ("rows", "columns")


def _is_int(value) -> bool:
    return isinstance(value, numbers.Integral) and not isinstance(value, (bool, np.bool_))


def _held_cluster(value) -> bool:
    """Whether ``value`` is a cluster back-end a command holds for its steps (core/backends.py)."""
    if "axiscope.core.backends" not in sys.modules:  # never made, then
        return False
    from .backends import ClusterBackend

    return isinstance(value, ClusterBackend)


def _is_real(value) -> bool:
    return isinstance(value, numbers.Real) and not isinstance(value, (bool, np.bool_))


@dataclass(frozen=True)
class EngineSettings:
    """How the leading singular triplets are computed, and how accurately.

    Parameters
    ----------
    method : {"auto", "randomized", "exact", "one-pass"}, default="auto"
        ``exact`` holds the preprocessed matrix in memory and calls LAPACK; ``randomized``
        streams it through block Krylov iterations; ``auto`` takes ``exact`` when the
        smaller side is at most 300 and the matrix fits a third of the memory budget.
        ``one-pass`` reads the input once, for statistics and two sketches together
        (:mod:`axiscope.core.onepass`): less accurate, and the per-sample distances are
        estimated.
    oversample : int, default=10
        Extra dimensions of each Krylov block beyond the number of components.
    power_iterations : int or "auto", default="auto"
        Passes of ``X̃ᵀX̃`` after the first sketch; ``"auto"`` stops when the leading
        singular values have settled to ``tol`` (at most 30), a number runs exactly that
        many (0 to 100).
    tol : float, default=1e-6
        Requested relative accuracy of the singular values; ``"auto"`` iterations stop
        when it is reached, and the fit reports whether each axis reached it.
    seed : int or numpy.random.Generator, default=0
        Seed of the random test matrices; the same seed gives the same result whatever the
        number of threads.
    """

    method: str = "auto"
    oversample: int = 10
    power_iterations: int | str = "auto"
    tol: float = 1e-6
    seed: int | np.random.Generator = 0

    def __post_init__(self) -> None:
        if self.method not in METHODS:
            raise OptionError(f"method={self.method!r} is not one of {', '.join(map(repr, METHODS))}; "
                              "choose one of them")
        if not (_is_int(self.oversample) and self.oversample >= 0):
            raise OptionError(f"oversample={self.oversample!r} is not a whole number >= 0; pass one (10 is usual)")
        q = self.power_iterations
        if q != "auto" and not (_is_int(q) and 0 <= q <= MAX_POWER_ITERATIONS):
            raise OptionError(f"power_iterations={q!r} is not 'auto' or a whole number from 0 to "
                              f"{MAX_POWER_ITERATIONS}; pass one of those")
        if not (_is_real(self.tol) and 0 < self.tol < 1):  # NaN fails both comparisons
            raise OptionError(f"tol={self.tol!r} is not a number between 0 and 1; pass e.g. 1e-6")
        # numpy's generators take no negative seed: refused here, rather than failing inside numpy
        if not (isinstance(self.seed, np.random.Generator) or (_is_int(self.seed) and self.seed >= 0)):
            raise OptionError(f"seed={self.seed!r} is not a whole number >= 0 or a numpy Generator; pass one")
        if q != "auto":
            object.__setattr__(self, "power_iterations", int(q))
        object.__setattr__(self, "oversample", int(self.oversample))
        object.__setattr__(self, "tol", float(self.tol))

    def generator(self) -> np.random.Generator:
        """The one random generator of a fit, made from ``seed``."""
        return self.seed if isinstance(self.seed, np.random.Generator) else np.random.default_rng(self.seed)

    def to_dict(self) -> dict:
        return {
            "method": self.method,
            "oversample": self.oversample,
            "power_iterations": self.power_iterations,
            "tol": self.tol,
            "seed": int(self.seed) if _is_int(self.seed) else None,
        }


@dataclass(frozen=True)
class Resources:
    """What a fit may use of the machine.

    Parameters
    ----------
    memory_limit : int or str, optional
        Budget for the data held by the fit, in bytes or written like ``512MB``, ``4GB``,
        ``1.5GiB`` (default: half of the machine's memory).
    threads : int, optional
        Blocks processed at once (default: the number of cores).
    scratch : path, optional
        Folder for the scratch file when transformed blocks do not fit in memory; made
        when the fit needs it and it does not exist (default: the system's temporary
        folder).
    scheduler : str or distributed.Client, optional
        Run the passes on a ``dask.distributed`` cluster: the address of its scheduler
        (``tcp://host:8786``) or a client connected to it (or a cluster a command holds for
        its steps, :func:`axiscope.core.backends.shared_cluster`). Workers read their own blocks
        from the input file, so it must be reachable at the same path on every worker.
        Default: the current client when the caller made one, otherwise threads of this
        process. Needs ``pip install "axiscope[cluster]"``.
    cluster : str, optional
        ``"local"`` or ``"local:N"``: start a cluster of N worker processes on this machine
        for the fit (default N: the number of cores), each with one thread and
        ``memory_limit / N`` of memory. Not together with ``scheduler``.
    """

    memory_limit: int | str | None = None
    threads: int | None = None
    scratch: str | os.PathLike | None = None
    scheduler: Any = None
    cluster: str | None = None

    def __post_init__(self) -> None:
        if self.memory_limit is not None:
            if isinstance(self.memory_limit, (bool, np.bool_)) or not isinstance(
                    self.memory_limit, (str, numbers.Real)):
                raise OptionError(f"memory_limit={self.memory_limit!r} is not a size; write it like 512MB, "
                                  "4GB or 1.5GiB")
            if not isinstance(self.memory_limit, str) and not np.isfinite(float(self.memory_limit)):
                raise OptionError(f"memory_limit={self.memory_limit!r} is not a finite size; write it like "
                                  "512MB, 4GB or 1.5GiB")
            try:
                parse_memory(self.memory_limit)  # raises with the parameter's name
            except (OverflowError, ValueError) as exc:  # a number too large for a float ("1e400")
                raise OptionError(f"memory_limit={self.memory_limit!r} is not a finite size; write it like "
                                  "512MB, 4GB or 1.5GiB") from exc
        if self.threads is not None and not (_is_int(self.threads) and self.threads >= 1):
            raise OptionError(f"threads={self.threads!r} is not a whole number >= 1; pass one")
        self._check_cluster()
        if self.scratch is not None:
            if not isinstance(self.scratch, (str, os.PathLike)):
                raise OptionError(f"scratch={self.scratch!r} is not a path; pass a folder")
            path = Path(self.scratch)
            if path.exists() and not path.is_dir():
                raise OptionError(f"scratch={str(path)!r} is a file, not a folder; choose a folder")
            object.__setattr__(self, "scratch", path)

    def _check_cluster(self) -> None:
        if self.scheduler is not None and self.cluster is not None:
            raise OptionError("pass either scheduler (a running cluster) or cluster (one started for the "
                              "run), not both")
        if self.cluster is not None:
            from .backends import parse_cluster

            parse_cluster(self.cluster)
        if self.scheduler is not None and not (
                (isinstance(self.scheduler, str) and self.scheduler.strip())
                or hasattr(self.scheduler, "submit") or _held_cluster(self.scheduler)):
            raise OptionError(f"scheduler={self.scheduler!r} is neither a scheduler address nor a "
                              "distributed.Client; pass one like tcp://host:8786")

    @property
    def budget(self) -> int:
        """The memory budget in bytes."""
        return default_memory_limit() if self.memory_limit is None else parse_memory(self.memory_limit)

    @property
    def n_threads(self) -> int:
        """The number of threads (``threads``, or the number of cores)."""
        return max(1, int(self.threads or os.cpu_count() or 1))

    def scratch_folder(self) -> Path | None:
        """The scratch folder, made if it does not exist yet (None: the temporary folder)."""
        if self.scratch is None:
            return None
        try:
            self.scratch.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise OptionError(f"scratch={str(self.scratch)!r} cannot be made ({exc.strerror}); "
                              "choose another folder") from exc
        return self.scratch


@dataclass(frozen=True)
class InputLayout:
    """Where the matrix and its ids are inside a file, and which way round it is stored.

    Used when :func:`axiscope.fit` is given a path; a :class:`axiscope.io.MatrixSource`
    already knows its layout.

    Parameters
    ----------
    dataset : str, optional
        The 2-D dataset inside an HDF5 file or Zarr store (default: the only one).
    sample_ids, feature_ids : str, optional
        A dataset in the same file, or a one-column text file, with the ids.
    samples_in : {"rows", "columns"}, default="rows"
        Whether samples are the file's rows or its columns.
    allow_external_data : bool, default=False
        HDF5: accept a dataset whose values are kept in other files (external link,
        external raw storage, virtual dataset); refused by default.
    allow_missing_chunks : bool, default=False
        Zarr and HDF5: read chunks that were never written as the fill value (their
        number is logged); by default a missing chunk is an error.
    sparse_names : str, optional
        Sparse input in HDF5 or Zarr: the names of the values, indices and pointer arrays
        and of the shape, comma-separated (default ``"data,indices,indptr,shape"``).
    compressed_axis : {"auto", "rows", "columns"}, default="auto"
        Sparse input: whether the pointers run over the stored rows (CSR) or columns (CSC).
    """

    dataset: str | None = None
    sample_ids: str | None = None
    feature_ids: str | None = None
    samples_in: str = "rows"
    allow_external_data: bool = False
    allow_missing_chunks: bool = False
    sparse_names: str | None = None
    compressed_axis: str = "auto"

    def __post_init__(self) -> None:
        if self.samples_in not in SAMPLES_IN:
            raise OptionError(f"samples_in={self.samples_in!r} is not one of {', '.join(map(repr, SAMPLES_IN))}; "
                              "choose one of them")
        for name in ("dataset", "sample_ids", "feature_ids"):
            value = getattr(self, name)
            if value is not None and not isinstance(value, (str, os.PathLike)):
                raise OptionError(f"{name}={value!r} is not a name or a path; pass a string")
            if isinstance(value, os.PathLike):
                object.__setattr__(self, name, os.fspath(value))
        for name in ("allow_external_data", "allow_missing_chunks"):
            value = getattr(self, name)
            if not isinstance(value, (bool, np.bool_)):
                raise OptionError(f"{name}={value!r} is not True or False; pass a bool")
            object.__setattr__(self, name, bool(value))

    @property
    def is_default(self) -> bool:
        return self == InputLayout()

    def open_options(self) -> dict:
        """Keyword arguments of :func:`axiscope.io.open_matrix`."""
        return {"dataset": self.dataset, "sample_ids": self.sample_ids, "feature_ids": self.feature_ids,
                "samples_in": self.samples_in, "allow_external_data": self.allow_external_data,
                "allow_missing_chunks": self.allow_missing_chunks, "sparse_names": self.sparse_names,
                "compressed_axis": self.compressed_axis}
