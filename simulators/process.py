"""Sensor series with daily cycles and noise, and the true process that the model tries to learn."""

from __future__ import annotations

import numpy as np

from .scenario import Process, Sensor


def local_hour(t: np.ndarray, utc_offset_h: float) -> np.ndarray:
    """Hour of the local day (0 <= h < 24) for Unix times ``t``.

    >>> float(local_hour(np.array([3600.0 * 25]), 2.0)[0])
    3.0
    """
    return ((t + utc_offset_h * 3600.0) % 86400.0) / 3600.0


def ar1(rng: np.random.Generator, n: int, sd: float, step_s: float, tau_s: float) -> np.ndarray:
    """A stationary AR(1) series with standard deviation ``sd`` and correlation time ``tau_s``.

    The lag-one correlation is exp(-step/tau), the discretisation of an Ornstein-Uhlenbeck
    process, so the noise has the same character whatever the prediction interval.
    """
    if sd == 0 or n == 0:
        return np.zeros(n)
    phi = float(np.exp(-step_s / tau_s))
    shocks = rng.standard_normal(n) * sd * np.sqrt(1.0 - phi * phi)
    out = np.empty(n)
    out[0] = rng.standard_normal() * sd
    for i in range(1, n):
        out[i] = phi * out[i - 1] + shocks[i]
    return out


def daily_cycle(sensor: Sensor, hours: np.ndarray) -> np.ndarray:
    """The sensor's mean level at each local hour (events per hour for counts)."""
    return sensor.mean + sensor.daily_amplitude * np.cos(2.0 * np.pi * (hours - sensor.peak_hour) / 24.0)


def sensor_series(
    sensor: Sensor, t: np.ndarray, step_s: float, utc_offset_h: float, rng: np.random.Generator
) -> np.ndarray:
    """Real values of one sensor at the times ``t`` (evenly spaced by ``step_s``)."""
    level = daily_cycle(sensor, local_hour(t, utc_offset_h))
    if sensor.kind == "counts":
        per_step = rng.poisson(np.maximum(level, 0.0) * step_s / 3600.0).astype(float)
        k = max(1, int(round(sensor.count_window_min * 60.0 / step_s)))
        csum = np.concatenate([[0.0], np.cumsum(per_step)])
        idx = np.arange(1, len(per_step) + 1)
        values = csum[idx] - csum[np.maximum(idx - k, 0)]
        # the first k-1 counts cover a shorter window: scale up to the full window's expectation
        covered = np.minimum(idx, k)
        values = np.round(values * k / covered)
    else:
        values = level + ar1(rng, len(t), sensor.noise_sd, step_s, sensor.noise_tau_min * 60.0)
    if sensor.min is not None or sensor.max is not None:
        values = np.clip(values, sensor.min, sensor.max)
    return values


def process_mean(process: Process, real: dict[str, np.ndarray]) -> np.ndarray:
    """The noise-free target given the real sensor values."""
    n = len(next(iter(real.values())))
    y = np.full(n, process.intercept, dtype=float)
    for term in process.terms:
        if term.hinge is not None:
            y += term.coef * np.maximum(0.0, real[term.hinge] - term.above)
        else:
            prod = np.ones(n)
            for name, power in term.of.items():
                prod = prod * real[name] ** power
            y += term.coef * prod
    return y


def process_truth(process: Process, real: dict[str, np.ndarray], step_s: float, rng: np.random.Generator) -> np.ndarray:
    """Measured truth: process mean, an autocorrelated disturbance and meter noise."""
    mean = process_mean(process, real)
    n = len(mean)
    disturbance = ar1(rng, n, process.noise_sd, step_s, process.noise_tau_min * 60.0)
    meter = rng.standard_normal(n) * process.meter_sd
    return mean + disturbance + meter
