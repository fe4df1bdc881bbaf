"""Reading matrices and ids from files, and writing results atomically.

Knows files and ids, nothing about principal components.
"""

from .readers import (
    SAMPLES_IN,
    MatrixSource,
    array_source,
    describe_source,
    open_matrix,
    opened,
)

__all__ = ["SAMPLES_IN", "MatrixSource", "array_source", "describe_source", "open_matrix", "opened"]
