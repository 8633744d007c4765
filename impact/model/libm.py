"""Elementwise transcendental functions through the C library, for the model's numpy reference.

The compiled kernels call the C library's ``cos`` one value at a time; numpy's vectorised ``cos`` may
differ from it in the last bit, and one bit is enough to part the reference from the kernels over a
long integration. So the reference computes its cosines here, compiled by numba, the same way.
"""

from __future__ import annotations

import math

import numba
import numpy as np


@numba.njit(cache=True, nogil=True, error_model="numpy")
def cos_array(x):
    """``cos(x)`` elementwise through the C library (as the kernel computes it): x (n,) -> (n,)."""
    out = np.empty_like(x)
    for i in range(x.shape[0]):
        out[i] = math.cos(x[i])
    return out
