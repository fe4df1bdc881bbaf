"""axiscope: principal component analysis of large, wide numeric tables, out of core.

The names below are imported on first use, so that ``import axiscope`` (and the command
line's ``--help``) does not pay for numpy, dask and h5py until they are needed.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

__version__ = "0.1.0"

_EXPORTS = {
    "AxiscopeError": "axiscope.errors",
    "InputError": "axiscope.errors",
    "ModelError": "axiscope.errors",
    "OptionError": "axiscope.errors",
    "FitResult": "axiscope.fitting",
    "fit": "axiscope.fitting",
    "Model": "axiscope.model",
    "load_model": "axiscope.model",
    "PreprocessSpec": "axiscope.core.preprocess",
    "EngineSettings": "axiscope.core.options",
    "Resources": "axiscope.core.options",
    "InputLayout": "axiscope.core.options",
    "Covariates": "axiscope.core.adjust",
    "MatrixSource": "axiscope.io",
    "open_matrix": "axiscope.io",
}

__all__ = ["__version__", *_EXPORTS]

if TYPE_CHECKING:  # pragma: no cover
    from .core.adjust import Covariates  # noqa: F401
    from .core.options import EngineSettings, InputLayout, Resources  # noqa: F401
    from .core.preprocess import PreprocessSpec  # noqa: F401
    from .errors import AxiscopeError, InputError, ModelError, OptionError  # noqa: F401
    from .fitting import FitResult, fit  # noqa: F401
    from .io import MatrixSource, open_matrix  # noqa: F401
    from .model import Model, load_model  # noqa: F401


def __getattr__(name: str) -> Any:
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module 'axiscope' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(__all__)
