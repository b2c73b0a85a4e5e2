"""Pointwise losses of a binary label y in {0, 1} at a margin z, with their first two derivatives.

Two losses are offered; both are written in terms of the signed margin m = s * z with s = 2y - 1:

* ``"logistic"``: l = log(1 + exp(-m)), the negative log-likelihood of the logistic model
  p = 1 / (1 + exp(-z)) ("The Regression Analysis of Binary Sequences", Journal of the Royal
  Statistical Society B, 1958).
* ``"squared-hinge"``: l = max(0, 1 - m)^2, the L2-loss support vector machine loss ("A Dual
  Coordinate Descent Method for Large-scale Linear SVM", ICML 2008).

All functions stay finite and accurate for |z| up to 1e4 and beyond: the logistic loss is evaluated as
max(-m, 0) + log1p(exp(-|m|)) and its derivative as -s * sigmoid(-m) with the sigmoid written so that
``exp`` never receives a positive argument (no overflow, no cancellation in 1 - p).

The scalar functions are numba kernels (``@njit(cache=True)``) used by :mod:`trainer.kernels`; the
``pointwise_*`` functions are the array versions for Python callers, and :func:`expit` gives the
probabilities of margins for models and metrics.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from trainer.errors import UserError

LOGISTIC = 0
SQUARED_HINGE = 1

LOSS_NAMES = {"logistic": LOGISTIC, "squared-hinge": SQUARED_HINGE}


def loss_code(name: str) -> int:
    """Map a loss name to the integer code the numba kernels take.

    Parameters
    ----------
    name : str
        ``"logistic"`` or ``"squared-hinge"``.

    Returns
    -------
    int
        :data:`LOGISTIC` or :data:`SQUARED_HINGE`.

    Raises
    ------
    UserError
        Naming the ``--loss`` option, for any other value.
    """
    if name not in LOSS_NAMES:
        raise UserError(f"--loss must be one of {', '.join(LOSS_NAMES)}; got {name!r}")
    return LOSS_NAMES[name]


@njit(cache=True)
def sigmoid(z: float) -> float:
    """1 / (1 + exp(-z)) without overflow for any finite z (common practice).

    Parameters
    ----------
    z : float
        The margin.

    Returns
    -------
    float
        The logistic function of z, in [0, 1].
    """
    if z >= 0.0:
        return 1.0 / (1.0 + math.exp(-z))
    e = math.exp(z)
    return e / (1.0 + e)


@njit(cache=True, nogil=True)
def _expit(z: np.ndarray) -> np.ndarray:
    out = np.empty(z.shape[0], dtype=np.float64)
    for i in range(z.shape[0]):
        out[i] = 1.0 / (1.0 + math.exp(-z[i]))
    return out


def expit(z) -> np.ndarray:
    """The logistic function 1 / (1 + exp(-z)) of every element, by the formula of
    ``scipy.special.expit`` (the same values bit for bit, without importing scipy.special, about
    0.2 s of a run's start-up); 0 and 1 at the extremes instead of an overflow.

    Parameters
    ----------
    z : array_like
        The margins.

    Returns
    -------
    numpy.ndarray
        float64 probabilities, shaped like ``z``.

    References
    ----------
    "The Regression Analysis of Binary Sequences", Journal of the Royal Statistical Society B, 1958.
    """
    z = np.asarray(z, dtype=np.float64)
    return _expit(np.ascontiguousarray(z).reshape(-1)).reshape(z.shape)


@njit(cache=True)
def logistic_loss(y: float, z: float) -> float:
    """Logistic loss log(1 + exp(-(2y-1) z)) as max(-m, 0) + log1p(exp(-|m|)); finite for finite z.

    Parameters
    ----------
    y : float
        The label, 0 or 1.
    z : float
        The margin.

    Returns
    -------
    float
        The loss.

    References
    ----------
    "The Regression Analysis of Binary Sequences", Journal of the Royal Statistical Society B, 1958.
    """
    m = z if y > 0.5 else -z
    if m > 0.0:
        return math.log1p(math.exp(-m))
    return -m + math.log1p(math.exp(m))


@njit(cache=True)
def logistic_dloss(y: float, z: float) -> float:
    """Derivative of the logistic loss in z: p - y, computed as -s * sigmoid(-s z) (no cancellation).

    Parameters
    ----------
    y : float
        The label, 0 or 1.
    z : float
        The margin.

    Returns
    -------
    float
        The derivative.

    References
    ----------
    "The Regression Analysis of Binary Sequences", Journal of the Royal Statistical Society B, 1958.
    """
    if y > 0.5:
        return -sigmoid(-z)
    return sigmoid(z)


@njit(cache=True)
def logistic_d2loss(y: float, z: float) -> float:
    """Second derivative of the logistic loss in z: p (1 - p) = e / (1 + e)^2 with e = exp(-|z|).

    Parameters
    ----------
    y : float
        The label, 0 or 1.
    z : float
        The margin.

    Returns
    -------
    float
        The second derivative.

    References
    ----------
    "The Regression Analysis of Binary Sequences", Journal of the Royal Statistical Society B, 1958.
    """
    e = math.exp(-abs(z))
    return e / ((1.0 + e) * (1.0 + e))


@njit(cache=True)
def squared_hinge_loss(y: float, z: float) -> float:
    """Squared hinge loss max(0, 1 - (2y-1) z)^2.

    Parameters
    ----------
    y : float
        The label, 0 or 1.
    z : float
        The margin.

    Returns
    -------
    float
        The loss.

    References
    ----------
    "A Dual Coordinate Descent Method for Large-scale Linear SVM", ICML, 2008.
    """
    m = z if y > 0.5 else -z
    u = 1.0 - m
    if u > 0.0:
        return u * u
    return 0.0


@njit(cache=True)
def squared_hinge_dloss(y: float, z: float) -> float:
    """Derivative of the squared hinge loss in z: -2 s max(0, 1 - s z).

    Parameters
    ----------
    y : float
        The label, 0 or 1.
    z : float
        The margin.

    Returns
    -------
    float
        The derivative.

    References
    ----------
    "A Dual Coordinate Descent Method for Large-scale Linear SVM", ICML, 2008.
    """
    s = 1.0 if y > 0.5 else -1.0
    u = 1.0 - s * z
    if u > 0.0:
        return -2.0 * s * u
    return 0.0


@njit(cache=True)
def squared_hinge_d2loss(y: float, z: float) -> float:
    """Generalized second derivative of the squared hinge loss: 2 where 1 - s z > 0, else 0.

    Parameters
    ----------
    y : float
        The label, 0 or 1.
    z : float
        The margin.

    Returns
    -------
    float
        2.0 or 0.0.

    References
    ----------
    "A Dual Coordinate Descent Method for Large-scale Linear SVM", ICML, 2008.
    """
    m = z if y > 0.5 else -z
    if 1.0 - m > 0.0:
        return 2.0
    return 0.0


@njit(cache=True)
def loss(code: int, y: float, z: float) -> float:
    """Loss ``code`` of label y at margin z.

    Parameters
    ----------
    code : int
        :data:`LOGISTIC` or :data:`SQUARED_HINGE`.
    y : float
        The label, 0 or 1.
    z : float
        The margin.

    Returns
    -------
    float
        The loss.
    """
    if code == LOGISTIC:
        return logistic_loss(y, z)
    return squared_hinge_loss(y, z)


@njit(cache=True)
def dloss(code: int, y: float, z: float) -> float:
    """First derivative in z of loss ``code`` of label y at margin z.

    Parameters
    ----------
    code : int
        :data:`LOGISTIC` or :data:`SQUARED_HINGE`.
    y : float
        The label, 0 or 1.
    z : float
        The margin.

    Returns
    -------
    float
        The derivative.
    """
    if code == LOGISTIC:
        return logistic_dloss(y, z)
    return squared_hinge_dloss(y, z)


@njit(cache=True)
def loss_dloss(code: int, y: float, z: float) -> tuple[float, float]:
    """:func:`loss` and :func:`dloss` of label y at margin z, bit for bit, with one exponential for the
    logistic loss: both take exp(-|z|) (:func:`logistic_loss` as exp(-m) or exp(m) with m = +-z,
    :func:`sigmoid` as exp(-x) or exp(x) with x = -+z).

    Parameters
    ----------
    code : int
        :data:`LOGISTIC` or :data:`SQUARED_HINGE`.
    y : float
        The label, 0 or 1.
    z : float
        The margin.

    Returns
    -------
    tuple of float
        The loss and its derivative.
    """
    if code != LOGISTIC:
        return squared_hinge_loss(y, z), squared_hinge_dloss(y, z)
    e = math.exp(-abs(z))
    positive = y > 0.5
    m = z if positive else -z
    value = math.log1p(e) if m > 0.0 else -m + math.log1p(e)
    x = -z if positive else z
    p = 1.0 / (1.0 + e) if x >= 0.0 else e / (1.0 + e)
    return value, -p if positive else p


@njit(cache=True)
def d2loss(code: int, y: float, z: float) -> float:
    """Second (Gauss-Newton) derivative in z of loss ``code`` of label y at margin z.

    Parameters
    ----------
    code : int
        :data:`LOGISTIC` or :data:`SQUARED_HINGE`.
    y : float
        The label, 0 or 1.
    z : float
        The margin.

    Returns
    -------
    float
        The second derivative.
    """
    if code == LOGISTIC:
        return logistic_d2loss(y, z)
    return squared_hinge_d2loss(y, z)


@njit(cache=True)
def _pointwise(code: int, order: int, labels: np.ndarray, margins: np.ndarray) -> np.ndarray:
    out = np.empty(margins.shape[0], dtype=np.float64)
    for i in range(margins.shape[0]):
        if order == 0:
            out[i] = loss(code, labels[i], margins[i])
        elif order == 1:
            out[i] = dloss(code, labels[i], margins[i])
        else:
            out[i] = d2loss(code, labels[i], margins[i])
    return out


def _arrays(labels, margins) -> tuple[np.ndarray, np.ndarray]:
    y = np.ascontiguousarray(labels, dtype=np.float64)
    z = np.ascontiguousarray(margins, dtype=np.float64)
    if y.shape != z.shape or y.ndim != 1:
        raise ValueError(f"labels and margins must be 1-D of equal length; got {y.shape} and {z.shape}")
    return y, z


def pointwise_loss(name: str, labels, margins) -> np.ndarray:
    """Per-row loss of labels at margins.

    Parameters
    ----------
    name : {"logistic", "squared-hinge"}
        The loss (see the module docstring for the formulas and their published sources).
    labels : array_like
        0/1 labels, 1-D.
    margins : array_like
        Margins, 1-D, as long as ``labels``.

    Returns
    -------
    numpy.ndarray
        float64, one loss per row.

    Raises
    ------
    UserError
        For an unknown loss name.
    ValueError
        When the two arrays are not 1-D of equal length.
    """
    y, z = _arrays(labels, margins)
    return _pointwise(loss_code(name), 0, y, z)


def pointwise_derivative(name: str, labels, margins) -> np.ndarray:
    """Per-row first derivative of the loss in the margin (logistic: p - y).

    Parameters
    ----------
    name : {"logistic", "squared-hinge"}
        The loss (see the module docstring for the formulas and their published sources).
    labels : array_like
        0/1 labels, 1-D.
    margins : array_like
        Margins, 1-D, as long as ``labels``.

    Returns
    -------
    numpy.ndarray
        float64, one derivative per row.

    Raises
    ------
    UserError
        For an unknown loss name.
    ValueError
        When the two arrays are not 1-D of equal length.
    """
    y, z = _arrays(labels, margins)
    return _pointwise(loss_code(name), 1, y, z)


def pointwise_curvature(name: str, labels, margins) -> np.ndarray:
    """Per-row second derivative of the loss in the margin.

    Logistic: p(1-p); squared hinge: 2 on the active side, 0 elsewhere, the generalized Hessian of the
    ICML 2008 paper below.

    Parameters
    ----------
    name : {"logistic", "squared-hinge"}
        The loss (see the module docstring for the formulas and their published sources).
    labels : array_like
        0/1 labels, 1-D.
    margins : array_like
        Margins, 1-D, as long as ``labels``.

    Returns
    -------
    numpy.ndarray
        float64, one curvature per row.

    Raises
    ------
    UserError
        For an unknown loss name.
    ValueError
        When the two arrays are not 1-D of equal length.

    References
    ----------
    "A Dual Coordinate Descent Method for Large-scale Linear SVM", ICML, 2008.
    """
    y, z = _arrays(labels, margins)
    return _pointwise(loss_code(name), 2, y, z)
