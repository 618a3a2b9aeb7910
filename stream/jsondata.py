"""One conversion of metadata to JSON data, used by every file ranktide writes.

numpy scalars become Python numbers, arrays become lists, paths become strings
and non-finite floats become ``null`` (JSON has no NaN or infinity; a reader
sees "unknown", never a number that is not one). Anything else is refused with
the key it sits under, so a wrong value is found where it is written, not when
the file is read back.
"""

from __future__ import annotations

import math
import os
from collections.abc import Mapping
from typing import Any

import numpy as np
from ranktide.errors import ConfigError

__all__ = ["json_data"]


def json_data(value: Any, where: str = "value") -> Any:
    """``value`` as JSON data (dicts, lists, str, int, float, bool, None).

    Parameters
    ----------
    value : Any
        Nested mappings, sequences, numpy scalars/arrays, paths and plain values.
    where : str
        Name of the value, used in the error message (keys are appended).

    Raises
    ------
    ConfigError
        A value of another type (an object, a set, bytes), naming its key.
    """
    if isinstance(value, np.generic):
        value = value.item()
    elif isinstance(value, np.ndarray):
        value = value.tolist()
    elif isinstance(value, os.PathLike):
        value = os.fspath(value)
    if isinstance(value, bool) or value is None or isinstance(value, (str, int)):
        return value
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, Mapping):
        return {str(k): json_data(v, f"{where}.{k}") for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_data(v, f"{where}[{i}]") for i, v in enumerate(value)]
    raise ConfigError(
        f"{where}: {type(value).__name__} is not JSON data; use numbers, strings, lists or dicts"
    )
