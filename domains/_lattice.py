"""Lattice geometry shared by the scenes and the analysis: real and reciprocal bases, Bragg vectors."""

from __future__ import annotations

import numpy as np

from ._errors import InputError

LATTICE_KINDS = ("hexagonal", "square", "oblique")


def real_basis(kind, a_nm, angle_deg=0.0, *, b_nm=None, gamma_deg=None):
    """Real-space primitive vectors a1, a2 (rows, nm) of a 2-D lattice.

    Parameters
    ----------
    kind : {"hexagonal", "square", "oblique"}
        Lattice type. Hexagonal: |a1| = |a2| = a at 60 degrees; square: 90 degrees.
    a_nm : float
        Lattice constant |a1| in nm.
    angle_deg : float
        Direction of a1 from the x axis, degrees (counter-clockwise, y along rows).
    b_nm, gamma_deg : float, optional
        |a2| and the angle between a1 and a2, for an oblique lattice.

    Returns
    -------
    ndarray, shape (2, 2)
        Rows a1, a2 as (x, y) in nm.

    Examples
    --------
    >>> np.round(real_basis("hexagonal", 1.0), 4)
    array([[1.   , 0.   ],
           [0.5  , 0.866]])
    """
    if kind not in LATTICE_KINDS:
        raise InputError(f"lattice kind must be one of {LATTICE_KINDS}, got {kind!r}")
    if not a_nm or a_nm <= 0:
        raise InputError(f"a_nm must be positive, got {a_nm!r}")
    if kind == "hexagonal":
        b_nm, gamma_deg = a_nm, 60.0
    elif kind == "square":
        b_nm, gamma_deg = a_nm, 90.0
    elif b_nm is None or gamma_deg is None:
        raise InputError("an oblique lattice needs b_nm and gamma_deg")
    t0, t1 = np.deg2rad(angle_deg), np.deg2rad(angle_deg + gamma_deg)
    return np.array([[a_nm * np.cos(t0), a_nm * np.sin(t0)], [b_nm * np.cos(t1), b_nm * np.sin(t1)]])


def reciprocal_basis(real):
    """Reciprocal vectors b1, b2 (rows, rad/nm) with a_i . b_j = 2 pi delta_ij.

    Parameters
    ----------
    real : (2, 2) array_like
        Rows a1, a2 in nm.

    Returns
    -------
    ndarray, shape (2, 2)
        Rows b1, b2 in rad/nm.

    Examples
    --------
    >>> a = real_basis("square", 0.5)
    >>> np.round(reciprocal_basis(a) @ a.T / (2 * np.pi), 12)
    array([[1., 0.],
           [0., 1.]])
    """
    real = np.asarray(real, dtype=float)
    return 2 * np.pi * np.linalg.inv(real).T


def bragg_vectors(kind, a_nm, angle_deg=0.0):
    """The independent Bragg wavevectors used for drift correction and lock-in (rad/nm).

    Hexagonal: three vectors G1 = b1, G2 = b2, G3 = -(b1 + b2) of equal length
    4 pi / (sqrt(3) a) at 120 degrees, summing to zero. Square: G1 = b1, G2 = b2.

    Parameters
    ----------
    kind : {"hexagonal", "square"}
        Lattice type.
    a_nm : float
        Lattice constant in nm.
    angle_deg : float
        Direction of a1 from the x axis, degrees.

    Returns
    -------
    ndarray, shape (3, 2) or (2, 2)
        Rows (qx, qy) in rad/nm.

    Examples
    --------
    >>> g = bragg_vectors("hexagonal", 0.34)
    >>> bool(np.allclose(g.sum(axis=0), 0)), round(float(np.hypot(*g[0])), 3)
    (True, 21.339)
    """
    if kind not in ("hexagonal", "square"):
        raise InputError(f"bragg_vectors supports hexagonal and square lattices, got {kind!r}")
    return bragg_from_reciprocal(kind, reciprocal_basis(real_basis(kind, a_nm, angle_deg)))


def bragg_from_reciprocal(kind, b):
    """The Bragg vectors of a lattice from its reciprocal basis b1, b2 (rows, rad/nm).

    Hexagonal: G1 = b1, G2 = b2, G3 = -(b1 + b2) (b1, b2 at 120 degrees), summing to zero;
    other lattices: b1, b2.

    Examples
    --------
    >>> bragg_from_reciprocal("hexagonal", np.eye(2)).tolist()
    [[1.0, 0.0], [0.0, 1.0], [-1.0, -1.0]]
    """
    b = np.asarray(b, dtype=float)
    if kind == "hexagonal":
        return np.array([b[0], b[1], -(b[0] + b[1])])
    return np.array(b)
