"""Defaults shared by the Python API and the command line.

Kept free of numerical libraries so that the command line can show them in ``--help``
without importing numpy or pandas.
"""

#: Features listed per side of each axis, by every command and function.
DEFAULT_TOP_FEATURES = 20
#: Samples listed at each end of an axis and among those it represents poorly.
SAMPLES_PER_LIST = 10
