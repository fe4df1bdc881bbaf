"""axiscope: principal component analysis of large, wide numeric tables, out of core."""

__version__ = "0.1.0"

from .errors import AxiscopeError, InputError, ModelError, OptionError  # noqa: E402
from .fit import FitResult, fit  # noqa: E402
from .model import Model, load_model  # noqa: E402
from .preprocess import PreprocessSpec  # noqa: E402
from .readers import MatrixSource, open_matrix  # noqa: E402

__all__ = [
    "__version__",
    "AxiscopeError",
    "InputError",
    "ModelError",
    "OptionError",
    "FitResult",
    "fit",
    "Model",
    "load_model",
    "PreprocessSpec",
    "MatrixSource",
    "open_matrix",
]
