"""dyadperm: permutation inference (QAP, MRQAP) for network data.

Layers, bottom to top (a module imports only from its own layer or those below it):
``errors``, ``settings`` and ``kernels``; ``inputs`` (readers, study files, the dyad set);
``routes`` (one plan per model and data shape) and ``output.result``/``output.table``
(result objects and their text); ``pipeline`` (the one orchestrator: draws, chunks,
workers, run files, stop rules, p-values); ``output.report``/``output.plots``; and the
entry points ``api``, ``study``, ``planning``, ``calibrate``, ``demo``, ``cli``.
"""

__version__ = "0.1.0"

from .errors import (DyadpermError, DyadpermWarning, InputError, NumericalError,  # noqa: E402
                     RunFileError)
from .inputs.dyadic import Dyadic, gap, pair_sum, receiver, reverse, same, sender  # noqa: E402
from .inputs.sparse import SparseNetwork  # noqa: E402
from .inputs.waves import Waves  # noqa: E402
from .output.result import (CorrelationResult, LayerCorrelationResult,  # noqa: E402
                            RegressionResult)
from .settings import StopRule  # noqa: E402
from .api import correlate, open_result, regress  # noqa: E402
from .study import Study, load_study  # noqa: E402
from .calibrate import CalibrationResult, calibrate  # noqa: E402

__all__ = [
    "CalibrationResult", "CorrelationResult", "Dyadic", "DyadpermError", "DyadpermWarning",
    "InputError", "LayerCorrelationResult", "NumericalError", "RegressionResult",
    "RunFileError", "SparseNetwork", "StopRule", "Study", "calibrate", "correlate", "gap",
    "load_study", "open_result", "pair_sum", "receiver", "regress", "reverse", "same",
    "sender", "Waves",
]
