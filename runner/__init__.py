"""dyadperm: permutation inference (QAP, MRQAP) for network data."""

__version__ = "0.1.0"

from .dyadic import Dyadic, gap, pair_sum, receiver, reverse, same, sender  # noqa: E402
from .errors import (DyadpermError, DyadpermWarning, InputError, NumericalError,  # noqa: E402
                     RunFileError)
from .api import correlate, open_result, regress  # noqa: E402
from .result import CorrelationResult, LayerCorrelationResult, RegressionResult  # noqa: E402
from .precision import StopRule  # noqa: E402
from .sparse import SparseNetwork  # noqa: E402
from .study import Study, load_study  # noqa: E402
from .calibrate import CalibrationResult, calibrate  # noqa: E402

__all__ = [
    "CalibrationResult", "CorrelationResult", "Dyadic", "DyadpermError", "DyadpermWarning",
    "InputError", "LayerCorrelationResult", "NumericalError", "RegressionResult",
    "RunFileError", "SparseNetwork", "StopRule", "Study", "calibrate", "correlate", "gap",
    "load_study", "open_result", "pair_sum", "receiver", "regress", "reverse", "same",
    "sender",
]
