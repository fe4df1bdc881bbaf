"""Reading matrices and ids from files, and writing results atomically.

Knows files and ids, nothing about principal components.

=================  ===========================================================================
module             holds
=================  ===========================================================================
``formats``        :func:`open_matrix` (format detection, one reader per format), :func:`opened`
``source``         :class:`MatrixSource`, the storage back-end base, :func:`array_source`,
                   :func:`describe_source`
``hdf5``           HDF5 files (h5py; positioned reads of contiguous datasets)
``zarr_store``     Zarr directory stores, format 2 and 3
``npy``            ``.npy`` files (positioned reads or a memory map)
``sparse``         CSR/CSC in HDF5 or Zarr groups, SciPy ``.npz``, scipy.sparse in memory
``text``           delimited text, optionally gzipped, streamed into an anonymous scratch file
``ids``            sample and feature ids: generated, from id files or 1-D datasets, checked
``output``         atomic output directories, TSV/Parquet/JSON writers, result-table readers
=================  ===========================================================================
"""

from .formats import open_matrix, opened
from .source import SAMPLES_IN, MatrixSource, describe_source
from .sparse import array_source  # dense arrays, and scipy.sparse matrices and arrays

__all__ = ["SAMPLES_IN", "MatrixSource", "array_source", "describe_source", "open_matrix", "opened"]
