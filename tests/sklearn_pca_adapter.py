"""A pytest plugin that runs scikit-learn's own PCA tests against :class:`AxiscopePCA`.

Loaded with ``-p sklearn_pca_adapter`` by ``tests/test_sklearn_suite.py`` (in a subprocess,
on the ``test_pca.py`` that ships inside the installed scikit-learn). It replaces
``sklearn.decomposition.PCA`` by :class:`RenamedPCA` before that module is imported, so the
suite's ``PCA(...)`` builds our estimator. The adapter only renames parameters; all the
numbers come from axiscope's engine:

====================================  ==========================================================
scikit-learn parameter                 axiscope parameter
====================================  ==========================================================
``n_components``, ``whiten``,          the same
``random_state``
``svd_solver``                         ``method``: ``full``, ``covariance_eigh``, ``arpack`` →
                                       ``exact`` (each computes the leading axes to working
                                       precision); ``randomized`` → ``randomized``; ``auto`` →
                                       ``auto``
``iterated_power``                     ``power_iterations``
``n_oversamples``                      ``oversample``
``tol`` (ARPACK's tolerance),          no counterpart: axiscope keeps its own ``tol``; it never
``copy``,                              modifies its input and always orthonormalises between
``power_iteration_normalizer``         power iterations
(scikit-learn's fixed choice)          ``scale="none"`` (covariance PCA; axiscope's default is
                                       standardized PCA), ``center=True``
====================================  ==========================================================
"""

from __future__ import annotations

import sklearn.decomposition

from axiscope.estimator import AxiscopePCA

#: scikit-learn's ``svd_solver`` → axiscope's ``method``.
SOLVER_TO_METHOD = {
    "auto": "auto",
    "full": "exact",
    "covariance_eigh": "exact",
    "arpack": "exact",
    "randomized": "randomized",
}


class RenamedPCA(AxiscopePCA):
    """:class:`AxiscopePCA` under scikit-learn's parameter names (see the module's table)."""

    def __init__(self, n_components=None, *, copy=True, whiten=False, svd_solver="auto", tol=0.0,
                 iterated_power="auto", n_oversamples=10, power_iteration_normalizer="auto",
                 random_state=None):
        self.n_components = n_components
        self.copy = copy
        self.whiten = whiten
        self.svd_solver = svd_solver
        self.tol = tol
        self.iterated_power = iterated_power
        self.n_oversamples = n_oversamples
        self.power_iteration_normalizer = power_iteration_normalizer
        self.random_state = random_state

    def _options(self) -> dict:
        ours = AxiscopePCA().get_params()
        ours.update(
            n_components=self.n_components, whiten=self.whiten, random_state=self.random_state,
            method=SOLVER_TO_METHOD.get(self.svd_solver, self.svd_solver),
            power_iterations=self.iterated_power, oversample=self.n_oversamples,
            scale="none", center=True,
        )
        return ours


def pytest_configure(config):
    sklearn.decomposition.PCA = RenamedPCA
