"""Scores: plain functions over weights, true steering vectors and true covariances.

All functions broadcast over leading dimensions (trials, checkpoints), so a whole Monte
Carlo run is scored in a few batched calls. Weights are applied as ``y = w^H x``.

Sources: output SINR and the optimum bound, Van Trees, *Optimum Array Processing* (2002),
ch. 6; normalised SINR as in Reed, Mallett and Brennan (1974); white-noise gain (array
gain against spatially white noise), Cox, Zeskind and Kooij (1987).
"""
from __future__ import annotations

import numpy as np

from .processors._linalg import solve_hermitian

__all__ = ["output_sinr", "optimum_sinr", "normalised_sinr", "loss_db", "to_db",
           "white_noise_gain", "response_db"]


def _check_shapes(w: np.ndarray, a: np.ndarray, r: np.ndarray | None = None) -> None:
    if w.shape[-1] != a.shape[-1]:
        raise ValueError(f"weights have {w.shape[-1]} elements, steering vector {a.shape[-1]}")
    if r is not None and (r.shape[-1] != w.shape[-1] or r.shape[-2] != w.shape[-1]):
        raise ValueError(f"covariance is {r.shape[-2:]}, weights have {w.shape[-1]} elements")


def to_db(x, floor: float = 1e-30) -> np.ndarray:
    """10 log10 of a power ratio, floored to avoid -inf."""
    return 10.0 * np.log10(np.maximum(np.asarray(x, dtype=float), floor))


def output_sinr(weights: np.ndarray, steering: np.ndarray, covariance: np.ndarray,
                signal_power: float | np.ndarray) -> np.ndarray:
    """Output SINR ``sigma_s^2 |w^H a|^2 / (w^H R_in w)`` (linear).

    weights (..., N); steering: the TRUE wanted-source steering vector (..., N);
    covariance: the TRUE interference-plus-noise covariance (..., N, N); all broadcast.
    Van Trees (2002), eq. 6.x: the quantity every adaptive processor is judged by.
    Returns 0 for an all-zero weight (no output).
    """
    w = np.asarray(weights)
    a = np.asarray(steering)
    r = np.asarray(covariance)
    _check_shapes(w, a, r)
    num = np.asarray(signal_power) * np.abs(np.einsum("...n,...n->...", np.conj(w), a)) ** 2
    den = np.real(np.einsum("...n,...nm,...m->...", np.conj(w), r, w))
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)
    return out


def optimum_sinr(steering: np.ndarray, covariance: np.ndarray,
                 signal_power: float | np.ndarray) -> np.ndarray:
    """Optimum (clairvoyant MVDR) SINR ``sigma_s^2 a^H R_in^-1 a`` (linear), the upper
    bound of :func:`output_sinr` over all weights (Cauchy-Schwarz; Van Trees 2002, ch. 6).
    """
    a = np.asarray(steering)
    r = np.asarray(covariance)
    if r.shape[-1] != a.shape[-1]:
        raise ValueError("steering vector and covariance sizes differ")
    a_b = np.broadcast_to(a, np.broadcast_shapes(a.shape, r.shape[:-1]))
    x = solve_hermitian(np.broadcast_to(r, a_b.shape + (a.shape[-1],)), a_b)
    return np.asarray(signal_power) * np.real(np.einsum("...n,...n->...", np.conj(a_b), x))


def normalised_sinr(sinr: np.ndarray, optimum: np.ndarray) -> np.ndarray:
    """SINR over the optimum SINR, in [0, 1] for the true covariance (Reed, Mallett and
    Brennan 1974 call this the normalised SINR; its mean is what their theory
    predicts)."""
    return np.asarray(sinr) / np.asarray(optimum)


def loss_db(sinr: np.ndarray, optimum: np.ndarray) -> np.ndarray:
    """Loss against the optimum in dB (>= 0): ``-10 log10(SINR / SINR_opt)``."""
    return -to_db(normalised_sinr(sinr, optimum))


def white_noise_gain(weights: np.ndarray, steering: np.ndarray) -> np.ndarray:
    """White-noise gain ``|w^H a|^2 / (w^H w)`` (linear); N for the uniform
    phase-steered sum of N elements (the array gain against white noise), lower values
    mean less robustness to errors (Cox, Zeskind and Kooij 1987)."""
    w = np.asarray(weights)
    a = np.asarray(steering)
    _check_shapes(w, a)
    num = np.abs(np.einsum("...n,...n->...", np.conj(w), a)) ** 2
    den = np.real(np.einsum("...n,...n->...", np.conj(w), w))
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)


def response_db(weights: np.ndarray, toward: np.ndarray, reference: np.ndarray) -> np.ndarray:
    """Power response toward steering vector ``toward`` relative to the response toward
    ``reference``, in dB: ``10 log10(|w^H b|^2 / |w^H a|^2)``. With ``toward`` an
    interferer's true steering and ``reference`` the look direction this is the null
    depth (negative: a null)."""
    w = np.asarray(weights)
    num = np.abs(np.einsum("...n,...n->...", np.conj(w), toward)) ** 2
    den = np.abs(np.einsum("...n,...n->...", np.conj(w), reference)) ** 2
    return to_db(num) - to_db(den)
