"""The array namespace of some arrays, with a short cut for plain numpy (the runtime's single-step case)."""

from __future__ import annotations

import numpy as np
from array_api_compat import array_namespace


class _Numpy:
    """numpy (>= 2 implements the array API) with reductions that call the ufunc's reduce directly: numpy's
    np.sum/np.max/... wrappers cost a few microseconds per call, which matters on 7-element vectors at the
    control rate. Every other name is numpy's own."""

    @staticmethod
    def sum(x, axis=None, keepdims=False):
        return np.add.reduce(x, axis=axis, keepdims=keepdims)

    @staticmethod
    def max(x, axis=None, keepdims=False):
        return np.maximum.reduce(x, axis=axis, keepdims=keepdims)

    @staticmethod
    def min(x, axis=None, keepdims=False):
        return np.minimum.reduce(x, axis=axis, keepdims=keepdims)

    @staticmethod
    def any(x, axis=None, keepdims=False):
        return np.logical_or.reduce(x, axis=axis, keepdims=keepdims)

    @staticmethod
    def all(x, axis=None, keepdims=False):
        return np.logical_and.reduce(x, axis=axis, keepdims=keepdims)

    def __getattr__(self, name):
        value = getattr(np, name)
        setattr(self, name, value)  # found once, then a plain attribute
        return value


NUMPY = _Numpy()


def namespace(*arrays):
    """NUMPY for numpy arrays (array_namespace also costs microseconds per call), otherwise array_api_compat's
    namespace (torch)."""
    for a in arrays:
        if type(a) is not np.ndarray:
            return array_namespace(*arrays)
    return NUMPY
