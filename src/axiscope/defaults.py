"""Defaults shared by the Python API and the command line.

Kept free of numerical libraries so that the command line can show them in ``--help``
without importing numpy or pandas.
"""

#: Features listed per side of each axis, by every command and function.
DEFAULT_TOP_FEATURES = 20
#: Samples listed at each end of an axis and among those it represents poorly.
SAMPLES_PER_LIST = 10
#: Candidate axes of ``fit --components auto``.
DEFAULT_MAX_COMPONENTS = 50
#: Permuted copies of the subsample in the parallel analysis.
DEFAULT_PERMUTATIONS = 20
#: Largest random subsample of samples for the parallel analysis and the noise level.
DEFAULT_SIGNAL_SAMPLES = 3000
#: Largest number of groups tried when the number of groups is chosen from the data.
DEFAULT_MAX_GROUPS = 10
#: Above this many samples groups are made by k-means rather than Ward's method (the
#: agglomerative tree holds n(n−1)/2 distances: 1.6 GB at 20,000 samples).
WARD_MAX_SAMPLES = 20_000
