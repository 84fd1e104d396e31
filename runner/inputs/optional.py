"""Optional dependencies, imported only when a feature needs them.

pandas is optional: a pandas object can only exist when pandas has been imported, so
inputs are recognised by looking pandas up in ``sys.modules`` (never importing it), and
only features that must build a pandas object (``to_frame``) import it, with a one-line
:class:`InputError` when it is not installed.
"""

from __future__ import annotations

import sys
from typing import Any

from ..errors import InputError

#: What to install for the pandas features.
PANDAS_HINT = "pip install 'dyadperm[pandas]'"


def loaded_pandas() -> Any:
    """The pandas module when it has been imported, else None (pandas is never imported)."""
    return sys.modules.get("pandas")


def is_frame(obj: Any) -> bool:
    """True for a pandas DataFrame (False, without importing pandas, when it is absent)."""
    pd = loaded_pandas()
    return pd is not None and isinstance(obj, pd.DataFrame)


def is_series(obj: Any) -> bool:
    """True for a pandas Series (False, without importing pandas, when it is absent)."""
    pd = loaded_pandas()
    return pd is not None and isinstance(obj, pd.Series)


def require_pandas(what: str) -> Any:
    """Import pandas for ``what``; an InputError in one line when it is not installed."""
    try:
        import pandas
    except ImportError:
        raise InputError(f"{what} needs pandas, which is not installed ({PANDAS_HINT})") \
            from None
    return pandas
