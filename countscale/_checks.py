"""Input checks and small numerical helpers shared by the science modules (private).

Every check raises `InputError` or `InputTypeError` with the argument's name, the rule and the
offending value (see `countscale.errors`).
"""

from __future__ import annotations

import math
import numbers
from typing import Any

import numpy as np

from countscale.errors import InputError, InputTypeError


def as_generator(rng: Any) -> np.random.Generator:
    """A numpy Generator from an int seed (>= 0), a Generator (returned as is) or None."""
    if rng is None or isinstance(rng, np.random.Generator):
        return np.random.default_rng(rng)
    if isinstance(rng, numbers.Integral) and not isinstance(rng, bool):
        if rng < 0:
            raise InputError(f"`rng` seed must be >= 0; got {int(rng)!r}")
        return np.random.default_rng(int(rng))
    raise InputTypeError(
        f"`rng` must be an int seed, a numpy.random.Generator or None; got {rng!r}"
    )


def check_real(value, name, low=None, high=None, low_open=True, high_open=False):
    """A finite float inside an optional interval, or raise naming ``name``."""
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise InputTypeError(f"`{name}` must be a real number; got {type(value).__name__}")
    value = float(value)
    if not math.isfinite(value):
        raise InputError(f"`{name}` must be finite; got {value}")
    below = low is not None and (value <= low if low_open else value < low)
    above = high is not None and (value >= high if high_open else value > high)
    if below or above:
        left = "(" if low_open else "["
        right = ")" if (high_open or high is None) else "]"
        lo_text = "-inf" if low is None else f"{low:g}"
        hi_text = "inf" if high is None else f"{high:g}"
        raise InputError(f"`{name}` must be in {left}{lo_text}, {hi_text}{right}; got {value}")
    return value


def as_magnitudes(m, name="m"):
    """(float ndarray copy, was_scalar) of magnitudes; NaN passes through."""
    if isinstance(m, (str, bytes)):
        raise InputTypeError(f"`{name}` must be numeric magnitudes; got {type(m).__name__}")
    try:
        array = np.array(m, dtype=float, copy=True)
    except (TypeError, ValueError) as error:
        raise InputTypeError(
            f"`{name}` must be numeric magnitudes; got {type(m).__name__}"
        ) from error
    return array, array.ndim == 0


def read_only(array, dtype=float):
    """A read-only copy."""
    array = np.array(array, dtype=dtype, copy=True)
    array.flags.writeable = False
    return array


def real_scalar(name: str, value: Any) -> float:
    """A real scalar as float (finite or not); wrong kinds raise InputTypeError."""
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise InputTypeError(f"`{name}` must be a real number; got {value!r}")
    return float(value)


def finite_scalar(name: str, value: Any) -> float:
    x = real_scalar(name, value)
    if not math.isfinite(x):
        raise InputError(f"`{name}` must be finite; got {x!r}")
    return x


def real_array(name: str, value: Any) -> np.ndarray:
    """A float64 copy of ``value``; strings, booleans and objects raise InputTypeError."""
    if isinstance(value, (str, bytes, bool, np.bool_)):
        raise InputTypeError(f"`{name}` must be a real number or an array of them; got {value!r}")
    try:
        arr = np.array(value, dtype=float)  # a copy: the caller's array is never modified
    except (TypeError, ValueError):
        raise InputTypeError(
            f"`{name}` must be a real number or an array of them; got {value!r}"
        ) from None
    if np.asarray(value).dtype.kind in "bUS":
        raise InputTypeError(f"`{name}` must be a real number or an array of them; got {value!r}")
    return arr


def first_bad(arr: np.ndarray, bad: np.ndarray) -> str:
    """'-0.5' for a scalar, '-0.5 (at index 3)' for an array: the first offending value."""
    if arr.ndim == 0:
        return repr(float(arr))
    index = tuple(int(i) for i in np.argwhere(bad)[0])
    where = index[0] if len(index) == 1 else index
    return f"{float(arr[index])!r} (at index {where})"


def as_output(values: np.ndarray, scalar: bool) -> float | np.ndarray:
    """A float for scalar input, a float ndarray otherwise."""
    return float(values) if scalar else np.asarray(values, dtype=float)


def numerical_hessian(function, theta, steps):
    """Central-difference Hessian of a scalar function."""
    n = theta.size
    hessian = np.empty((n, n))
    f0 = function(theta)
    for i in range(n):
        e_i = np.zeros(n)
        e_i[i] = steps[i]
        hessian[i, i] = (function(theta + e_i) - 2.0 * f0 + function(theta - e_i)) / steps[i] ** 2
        for j in range(i):
            e_j = np.zeros(n)
            e_j[j] = steps[j]
            value = (
                function(theta + e_i + e_j)
                - function(theta + e_i - e_j)
                - function(theta - e_i + e_j)
                + function(theta - e_i - e_j)
            ) / (4.0 * steps[i] * steps[j])
            hessian[i, j] = hessian[j, i] = value
    return hessian


def numerical_gradient(function, theta, steps):
    """Central-difference gradient of a scalar function."""
    gradient = np.empty(theta.size)
    for i in range(theta.size):
        e_i = np.zeros(theta.size)
        e_i[i] = steps[i]
        gradient[i] = (function(theta + e_i) - function(theta - e_i)) / (2.0 * steps[i])
    return gradient
