"""The stiffness estimator's band-pass filter and the measures of it that its uncertainty needs.

A Butterworth band-pass around the dither, its statistical bandwidth (how many independent
samples a window of band-passed signals holds) and the power-weighted means of the squared and
fourth power of the angular frequency over its pass band (how a residual whose spectrum rises
with frequency is spread over the band).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import signal

from compliant_demo.exceptions import InvalidInputError

__all__ = ["BandPassMeasures", "band_pass_measures", "design_band_pass"]


def design_band_pass(band_hz: tuple[float, float], rate_hz: float, order: int = 2) -> np.ndarray:
    """Butterworth band-pass in second-order sections, the filter the estimator applies.

    Parameters
    ----------
    band_hz : (low, high), Hz
        Pass band; must satisfy 0 < low < high < rate_hz / 2.
    rate_hz : float, Hz
        Sample rate.
    order : int
        Butterworth order of each edge.

    Returns
    -------
    (n_sections, 6) array
        Second-order sections for :func:`scipy.signal.sosfilt`.
    """
    values = np.asarray(band_hz, dtype=float).ravel()
    low, high = (values[0], values[1]) if values.size == 2 else (np.nan, np.nan)
    if not (0 < low < high < rate_hz / 2):
        raise InvalidInputError(
            f"band_hz must satisfy 0 < low < high < rate_hz/2 = {rate_hz / 2}, got {band_hz!r}"
        )
    return signal.butter(order, [low, high], btype="bandpass", fs=rate_hz, output="sos")


@dataclass(frozen=True)
class BandPassMeasures:
    """What the estimator's uncertainty needs to know of its band-pass.

    Attributes
    ----------
    statistical_bandwidth_hz : float, Hz
        ``(integral |H|^2 df)^2 / integral |H|^4 df``: sums over T seconds of squares and
        products of signals band-passed by the filter vary like ``2 * B_s * T`` independent
        samples (Bendat and Piersol, Random Data, from memory); 1.5 times the width of the
        estimator's default band.
    mean_square_omega : float, (rad/s)^2
        ``integral w^2 |H|^2 df / integral |H|^2 df``.
    mean_fourth_omega : float, (rad/s)^4
        ``integral w^4 |H|^2 df / integral |H|^2 df``.
    """

    statistical_bandwidth_hz: float
    mean_square_omega: float
    mean_fourth_omega: float


def band_pass_measures(sos: np.ndarray, rate_hz: float) -> BandPassMeasures:
    """Statistical bandwidth and spectral moments of a filter (by its frequency response).

    Parameters
    ----------
    sos : (n_sections, 6) array
        Second-order sections (:func:`design_band_pass`).
    rate_hz : float, Hz

    Returns
    -------
    BandPassMeasures
    """
    frequency, response = signal.sosfreqz(sos, worN=1 << 16, fs=rate_hz)
    power = np.abs(response) ** 2
    omega_sq = (2.0 * np.pi * frequency) ** 2
    total = power.sum()
    step = frequency[1] - frequency[0]
    return BandPassMeasures(
        statistical_bandwidth_hz=float(total * total * step / (power * power).sum()),
        mean_square_omega=float((omega_sq * power).sum() / total),
        mean_fourth_omega=float((omega_sq**2 * power).sum() / total),
    )
