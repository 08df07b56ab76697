"""Input checks shared by every step: positive numbers and wavevectors within the Nyquist limit."""

from __future__ import annotations

import math

import numpy as np

from ._errors import InputError


def positive(value, name) -> float:
    """``value`` as a finite positive float, or an InputError naming ``name``.

    Examples
    --------
    >>> positive("0.5", "sigma_nm")
    0.5
    """
    try:
        value = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a number, got {value!r}") from None
    if not math.isfinite(value) or value <= 0:
        raise InputError(f"{name} must be positive (and finite), got {value!r}")
    return value


def within_nyquist(q, pixel_size, name="q"):
    """Raise an InputError naming ``name`` if any wavevector (qx, qy) lies beyond the Nyquist limit.

    Parameters
    ----------
    q : (k, 2) array
        Wavevectors in rad/nm.
    pixel_size : (float, float)
        (dy, dx) in nm; the limit is |qx| <= pi / dx, |qy| <= pi / dy.
    name : str
        Name used in the message.

    Examples
    --------
    >>> within_nyquist(np.array([[1.0, 0.0]]), (0.1, 0.1))
    """
    dy, dx = pixel_size
    nyquist = np.array([math.pi / dx, math.pi / dy])
    over = np.any(np.abs(q) > nyquist * (1 + 1e-12), axis=1)
    if np.any(over):
        raise InputError(
            f"{name} = {np.asarray(q)[over][0].tolist()} rad/nm lies beyond the Nyquist limit "
            f"(|qx| <= {nyquist[0]:.4g}, |qy| <= {nyquist[1]:.4g} rad/nm for this pixel size)"
        )
