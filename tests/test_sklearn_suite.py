"""scikit-learn's own PCA test suite, run against :class:`AxiscopePCA` (outside reference).

The suite is ``sklearn/decomposition/tests/test_pca.py`` of the installed scikit-learn. It
runs in a subprocess with the plugin ``tests/sklearn_pca_adapter.py``, which replaces
``sklearn.decomposition.PCA`` by a subclass of :class:`AxiscopePCA` that only renames
parameters. Every test must pass except those listed below, each with the reason (also
listed in DEVELOPERS.md, "scikit-learn's PCA suite"); a listed test that starts passing fails
this check too, so the list stays exact.

By default a quick selection runs (``QUICK``: the tests whose data are small); set
``AXISCOPE_SKLEARN_SUITE=full`` for the whole suite (about a minute of CPU; several on a
busy machine). float32 variants run (``SKLEARN_RUN_FLOAT32_TESTS=1``).
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import pytest
import sklearn


SITE = Path(sklearn.__file__).parent.parent
SUITE = Path(sklearn.__file__).parent / "decomposition" / "tests" / "test_pca.py"
FULL = os.environ.get("AXISCOPE_SKLEARN_SUITE") == "full"
#: The scikit-learn release whose suite the lists below describe.
LISTED_FOR = "1.9.1"

#: Tests of scikit-learn's private helpers only (``_assess_dimension``, ``_infer_dimension``
#: on hand-made spectra): they exercise no estimator, so they are not run.
PRIVATE_HELPERS = ("test_assess_dimension_bad_rank", "test_small_eigenvalues_mle", "test_assess_dimension_rank_one")

#: Quick selection (pytest -k): leaves out the sparse tests (the sparse suite covers them), the array-API checks
#: (skipped here anyway) and the slowest tests, which repeat fits the others already make
#: (twenty seeds; 1000-sample or digits matrices): about a third of the suite's time.
QUICK = ("not sparse and not array_api and not deterministic_output and not svd_solver_auto "
         "and not explained_variance_empirical and not sanity_noise_variance and not score_consistency "
         "and not variance_correctness and not singular_values")

#: Expected failures: (pattern on the test id, fragment of the failure message, reason).
DIFFERENCES = [
    (r"test_no_empty_slice_warning$", "is too large for 10 samples × 12 features",
     "n_components up to the centred rank min(n − 1, p): 10 axes of 10 centred samples are refused"),
    (r"test_pca_zero_noise_variance_edge_cases\[", "is too large for 3 samples × 100 features",
     "n_components up to the centred rank min(n − 1, p): 3 axes of 3 centred samples are refused"),
    (r"test_n_components_none\[data1-(full|randomized)-4\]", "assert 3 == 4",
     "n_components=None gives min(n − 1, p) axes (the centred rank), not min(n, p)"),
    (r"test_n_components_none\[data0-arpack-3\]", "assert 4 == 3",
     "ARPACK's own limit k < min(n, p) does not apply: there is no ARPACK solver"),
    (r"test_pca_solver_equivalence\[float(32|64)-42-(False|True)-True-(tall|wide)-(arpack|covariance_eigh)\]",
     "is more than the rank of the preprocessed matrix",
     "rank-deficient data: axes above the numerical rank (zero variance, arbitrary direction) are refused"),
    (r"test_pca_validation\[arpack-2-must be strictly less than min-data1\]", "DID NOT RAISE",
     "ARPACK's own limit k < min(n, p) does not apply: there is no ARPACK solver"),
    (r"test_pca_validation\[", "Regex pattern did not match",
     "error messages in axiscope's own words (same ValueError, same condition)"),
    (r"test_fit_mle_too_few_samples$", "Regex pattern did not match",
     "error messages in axiscope's own words (same ValueError, same condition)"),
    (r"test_n_components_mle_error\[(arpack|randomized)\]", "DID NOT RAISE",
     "'mle' works with every method (the spectrum comes from one exact pass)"),
    (r"test_pca_score\[(full|covariance_eigh|arpack|auto)\]", "assert ",
     "score_samples is the density of X whatever whiten is (whiten only rescales the scores)"),
    (r"test_pca_score3$", "n_components=0 is not a positive integer",
     "a model of zero axes is not fitted"),
    (r"test_pca_svd_solver_auto\[", "no attribute '_fit_svd_solver'",
     "reads scikit-learn's private attribute _fit_svd_solver"),
    (r"test_feature_names_out$", "PC1",
     "output columns are named PC1, PC2, … as in axiscope's tables"),
]

#: Either outcome, decided by rounding: (pattern, fragment of the failure message, reason).
#: Not counted among the passes.
ROUNDING_TIES = [
    (r"test_pca_score\[randomized\]", "assert ",
     "the whitened and plain models have the same density; the two randomized fits (unseeded) "
     "differ in the last bits, so 'll1 > ll2' holds or not by rounding"),
]

#: Sparse input (scipy.sparse, never densified): every method takes it.
SPARSE_DIFFERENCES = [
    (r"test_sparse_pca_solver_error\[", "DID NOT RAISE",
     "only ARPACK and covariance_eigh take sparse input in scikit-learn; every method does in axiscope"),
]

#: Skipped by scikit-learn itself in this environment: (pattern, fragment of the skip reason).
SKIPS = [
    (r"test_pca_(mle_)?array_api_compliance\[", ""),  # array-API namespaces not installed
    (r"test_array_api_error_and_warnings_on_unsupported_params$", "SCIPY_ARRAY_API"),
]

#: (tests passed, tests run): quick selection, whole suite (606 collected, 3 deselected as
#: private helpers; scikit-learn's own PCA passes all but the 196 array-API checks, skipped
#: here for both).
EXPECTED_PASSED = {"quick": (94, 133), "full": (354, 602)}


def _run_suite(tmp_path: Path) -> list[tuple[str, str, str]]:
    report = tmp_path / "suite.xml"
    args = [sys.executable, "-m", "pytest", str(SUITE), "-q", "-p", "no:cacheprovider", "-p", "sklearn_pca_adapter",
            "-o", "addopts=", f"--rootdir={SITE}", f"--confcutdir={SITE}", f"--junitxml={report}"]
    node = SUITE.relative_to(SITE).as_posix()  # node ids are relative to the rootdir
    args += [f"--deselect={node}::{name}" for name in PRIVATE_HELPERS]
    if not FULL:
        args += ["-k", QUICK]
    env = dict(os.environ, SKLEARN_RUN_FLOAT32_TESTS="1",
               PYTHONPATH=os.pathsep.join([str(Path(__file__).parent), os.environ.get("PYTHONPATH", "")]))
    done = subprocess.run(args, cwd=tmp_path, env=env, capture_output=True, text=True, timeout=3600)
    assert report.exists(), done.stdout[-3000:] + done.stderr[-3000:]
    outcomes = []
    for case in ET.parse(report).iter("testcase"):
        outcome, message = "passed", ""
        for child in case:
            if child.tag in ("failure", "error", "skipped"):
                outcome = "failed" if child.tag != "skipped" else "skipped"
                message = (child.get("message") or "") + "\n" + (child.text or "")
        outcomes.append((case.get("name"), outcome, message))
    return outcomes


def _match(name: str, message: str, table) -> tuple | None:
    for pattern, fragment, *reason in table:
        if re.match(pattern, name):
            return (pattern, fragment, *reason) if fragment in message else None
    return None


@pytest.mark.filterwarnings("ignore::DeprecationWarning")
def test_sklearn_pca_suite_passes_but_the_listed_differences(tmp_path):
    if sklearn.__version__ != LISTED_FOR:
        pytest.skip(f"the lists describe scikit-learn {LISTED_FOR}'s PCA suite, {sklearn.__version__} is installed: "
                    "run with AXISCOPE_SKLEARN_SUITE=full and update the lists and DEVELOPERS.md")
    outcomes = _run_suite(tmp_path)
    expected_failures = DIFFERENCES + SPARSE_DIFFERENCES
    unexpected, stale, unexplained_skips = [], [], []
    passed = 0
    for name, outcome, message in outcomes:
        if any(re.match(p, name) for p, *_ in ROUNDING_TIES):
            assert outcome == "passed" or _match(name, message, ROUNDING_TIES) is not None, name
            continue
        listed = any(re.match(p, name) for p, *_ in expected_failures)
        if outcome == "passed":
            passed += 1
            if listed:
                stale.append(name)
        elif outcome == "failed":
            if _match(name, message, expected_failures) is None:
                unexpected.append((name, message.splitlines()[0][:300]))
        elif _match(name, message, SKIPS) is None:
            unexplained_skips.append((name, message[:200]))
    assert not any(name in PRIVATE_HELPERS for name, _, _ in outcomes)
    assert unexpected == []
    assert stale == []  # a listed difference now passes: remove it from the list and DEVELOPERS.md
    assert unexplained_skips == []
    counted = [name for name, _, _ in outcomes if not any(re.match(p, name) for p, *_ in ROUNDING_TIES)]
    assert (passed, len(counted)) == EXPECTED_PASSED["full" if FULL else "quick"]
