"""Peak resident memory of one fit, run as a script by the memory tests (in a process of its own).

``python tests/rss_probe.py PATH LIMIT [METHOD [SCALE]]`` warms up (imports and first-use
allocations are not the fit's data memory), resets the kernel's high-water mark, fits ``PATH``
with 5 components (``METHOD`` with seed 3 when given) under ``memory_limit=LIMIT`` on 2 threads,
and prints one JSON line: the growth of the high-water mark over the warmed-up RSS (``delta``),
the plan, the passes and the singular values.
"""

import json
import sys

import numpy as np

from axiscope import EngineSettings, Resources
from axiscope.core.preprocess import PreprocessSpec
from axiscope.fitting.run import fit
from axiscope.io import array_source


def status(key: str) -> int:
    with open("/proc/self/status") as handle:
        for line in handle:
            if line.startswith(key + ":"):
                return int(line.split()[1]) * 1024  # kB
    raise KeyError(key)


def main(path: str, limit: str, method: str | None = None, scale: str | None = None) -> None:
    engine = EngineSettings(method=method, seed=3) if method else EngineSettings()
    preprocess = PreprocessSpec(scale=scale) if scale else PreprocessSpec()
    fit(array_source(np.random.default_rng(1).standard_normal((60, 40))), n_components=3,
        engine=EngineSettings(method=method or "randomized"))
    base = status("VmRSS")
    try:  # reset the high-water mark to the current RSS (Linux >= 4.0)
        with open("/proc/self/clear_refs", "w") as handle:
            handle.write("5")
    except OSError:
        pass
    result = fit(path, n_components=5, engine=engine, preprocess=preprocess,
                 resources=Resources(memory_limit=limit, threads=2))
    peak = status("VmHWM")
    print(json.dumps({"delta": peak - base, "plan": result.manifest["plan"],
                      "cache": result.manifest["plan"]["cache"], "passes": result.manifest["passes"]["count"],
                      "singular_values": result.factorization.singular_values.tolist()}))


if __name__ == "__main__":
    main(*sys.argv[1:])
