"""The array namespace of some arrays, with a short cut for plain numpy (the runtime's single-step case)."""

from __future__ import annotations

import numpy as np
from array_api_compat import array_namespace


def namespace(*arrays):
    """numpy itself for numpy arrays (numpy >= 2 implements the array API; array_namespace costs microseconds
    per call, which adds up at the control rate), otherwise array_api_compat's namespace (torch)."""
    if all(type(a) is np.ndarray for a in arrays):
        return np
    return array_namespace(*arrays)
