"""dyadperm: permutation inference (QAP, MRQAP) for network data."""

from .dyadic import Dyadic, gap, pair_sum, receiver, reverse, same, sender
from .errors import DyadpermError, DyadpermWarning, InputError, NumericalError, RunFileError

__version__ = "0.1.0"
from .api import correlate, open_result, regress
from .result import CorrelationResult, RegressionResult
from .sparse import SparseNetwork
from .study import Study, load_study
from .calibrate import CalibrationResult, calibrate
