"""The modified Bessel terms of the Rice law, fast: ``log I0(x)`` and ``I1(x) / I0(x)``.

The envelope of a sinusoid in complex Gaussian noise follows the Rice law, whose density
holds ``I0(x)`` and whose likelihood derivatives hold ``I1(x) / I0(x)`` [1]_. The OOK energy
detector and the OOK level fit evaluate both at every symbol, the fit once per iteration, and
``scipy.special.i0e`` / ``i1e`` cost some 40 ns per element each (measured on the project's
test machine). Here both come from one
table prepared once: piecewise cubic Hermite interpolation [2]_ on a uniform grid of
``u = x / (x + C)``, which maps ``0 <= x < inf`` onto ``0 <= u < 1``, of

- ``R(x) = I1(x) / I0(x)``, rising from 0 to 1, and
- ``H(x) = log(I0(x) e^-x) + log(1 + 2x) / 2``, which stays bounded (``H(0) = 0``,
  ``H(inf) = -log(pi) / 2``) so that ``log I0(x) = H(x) - log(1 + 2x) / 2 + x``.

The node values are ``scipy.special.i0e`` and ``i1e`` (the reference library); the node
derivatives follow from ``I0' = I1`` and ``I1' = I0 - I1 / x`` [1]_ (so ``R' = 1 - R/x - R^2``)
and, at ``u = 1``, from the asymptotic expansion ``R = 1 - 1/(2x) - 1/(8x^2) - ...`` [1]_.
The interpolation error of a cubic Hermite piece is at most ``h^4 max|f''''| / 384`` [2]_;
with ``NODES`` intervals it stays below ``1e-12`` for both functions (absolute, or
relative where ``log I0`` exceeds 1), measured against scipy from 0 to 1e300
(``tests/blocks/test_bessel.py``), i.e. far below the rounding of the complex64 samples the
arguments come from.

References
----------
.. [1] M. Abramowitz and I. A. Stegun, Handbook of Mathematical Functions, Dover, 1965,
   9.6.27 (derivatives of I0 and I1) and 9.7.1 (asymptotic expansion for large argument);
   equation numbers from memory.
.. [2] C. de Boor, A Practical Guide to Splines, Springer, 1978, ch. IV (piecewise cubic
   Hermite interpolation and its error bound; from memory).
"""

from __future__ import annotations

import math
from functools import cache

import numpy as np
from scipy.special import i0e, i1e

__all__ = ["NODES", "log_i0", "log_i0_and_ratio"]

#: Intervals of the table on ``0 <= u <= 1``.
NODES = 2048
#: Scale of the map ``u = x / (x + C)``: half of the table lies below ``x = C``.
_SCALE = 2.0


def _hermite(f: np.ndarray, d: np.ndarray) -> np.ndarray:
    """Coefficients ``(4, NODES)`` of ``c0 + c1 t + c2 t^2 + c3 t^3`` on every interval.

    ``f`` and ``d`` are the values and the derivatives (per unit of ``u``) at the nodes;
    ``t`` runs from 0 to 1 across an interval.
    """
    h = 1.0 / NODES
    f0, f1, d0, d1 = f[:-1], f[1:], d[:-1] * h, d[1:] * h
    return np.stack([f0, d0, 3.0 * (f1 - f0) - 2.0 * d0 - d1, 2.0 * (f0 - f1) + d0 + d1])


@cache
def _tables() -> tuple[tuple[np.ndarray, ...], tuple[np.ndarray, ...]]:
    """Hermite coefficients on the grid of ``u``, built on first use.

    Returns the coefficients of both functions, coefficient ``k`` of both in one complex array
    (``R`` in the real and ``H`` in the imaginary part, so that one gather serves both), and
    those of ``H`` alone.
    """
    u = np.arange(NODES) / NODES           # every node but u = 1 (x = inf)
    x = _SCALE * u / (1.0 - u)
    jac = _SCALE / (1.0 - u) ** 2           # dx/du
    r = i1e(x) / i0e(x)
    dr = np.empty_like(x)
    dr[0] = 0.5                             # R = x/2 - x^3/16 + ...
    dr[1:] = 1.0 - r[1:] / x[1:] - r[1:] ** 2
    h = np.log(i0e(x)) + 0.5 * np.log1p(2.0 * x)
    dh = r - 1.0 + 1.0 / (1.0 + 2.0 * x)
    # u = 1: R -> 1, dR/du -> 1/(2C); H -> -log(pi)/2, dH/du -> -3/(8C) (from 9.7.1)
    r_coef = _hermite(np.append(r, 1.0), np.append(dr * jac, 0.5 / _SCALE))
    h_coef = _hermite(np.append(h, -0.5 * math.log(math.pi)),
                      np.append(dh * jac, -3.0 / (8.0 * _SCALE)))
    # one more, constant piece at u = 1, where x / (x + C) rounds to 1 (x > 2 / eps)
    end = complex(r_coef[:, -1].sum(), h_coef[:, -1].sum())
    out = []
    for k in range(4):
        both = np.append(r_coef[k] + 1j * h_coef[k], end if k == 0 else 0.0)
        both.setflags(write=False)
        out.append(both)
    alone = tuple(np.ascontiguousarray(c.imag) for c in out)
    for c in alone:
        c.setflags(write=False)
    return tuple(out), alone


def _cubic(x: np.ndarray, coef: tuple[np.ndarray, ...]) -> np.ndarray:
    """The cubic piece of the interval holding each element of ``x``."""
    t = x / (x + _SCALE)
    t *= NODES
    index = t.astype(np.intp)
    t -= index                              # position 0 .. 1 inside the interval
    out = coef[3].take(index, mode="clip")
    out *= t
    for k in (2, 1):
        out += coef[k].take(index, mode="clip")
        out *= t
    out += coef[0].take(index, mode="clip")
    return out


def _log_i0_from(h: np.ndarray, x: np.ndarray) -> np.ndarray:
    """``log I0(x)`` from the interpolated ``H(x)`` (module notes)."""
    out = np.multiply(x, 2.0)
    np.log1p(out, out=out)
    out *= -0.5
    out += h
    out += x
    return out


def log_i0(x: np.ndarray) -> np.ndarray:
    """``log I0(x)`` for ``x >= 0``, without overflow.

    Parameters
    ----------
    x : numpy.ndarray
        Finite arguments, ``x >= 0`` (float64).

    Returns
    -------
    numpy.ndarray
        float64 ``log I0(x)``, within ``1e-12`` of ``log(scipy.special.i0e(x)) + x``
        (absolute, or relative where it exceeds 1).

    Notes
    -----
    ``x`` must be finite: the symbols it comes from are checked to be so by the blocks.
    """
    x = np.asarray(x, dtype=np.float64)
    return _log_i0_from(_cubic(x, _tables()[1]), x)


def log_i0_and_ratio(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``log I0(x)`` and ``I1(x) / I0(x)`` for ``x >= 0``, sharing one table look-up.

    Parameters
    ----------
    x : numpy.ndarray
        Finite arguments, ``x >= 0`` (float64).

    Returns
    -------
    log_i0 : numpy.ndarray
        As ``log_i0``.
    ratio : numpy.ndarray
        ``I1(x) / I0(x)`` within ``1e-12`` absolute (0 at ``x = 0``, tending to 1).
    """
    x = np.asarray(x, dtype=np.float64)
    both = _cubic(x, _tables()[0])
    return _log_i0_from(both.imag, x), both.real
