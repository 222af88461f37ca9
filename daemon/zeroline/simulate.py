"""Simulated field sensors with known truth, for examples, the demo and scenario tests.

Every scenario here is invented (our own sites and numbers); none is measured data. Each
returns columns as numpy arrays: `time` (UTC epoch seconds), `value` (what the logger
reports), the named inputs a channel config reads, and `truth_*` columns that a test or the
demo compares with — the simulated true quantity and the simulated drift.
"""

from __future__ import annotations

import csv
import math
from collections.abc import Mapping
from pathlib import Path

import numpy as np
import numpy.typing as npt

Array = npt.NDArray[np.float64]
DAY = 86400.0
START = 1793491200.0  # 2026-11-01T00:00:00Z

#: Nernst slope at 25 °C in mV per pH unit: 1000·R·T·ln(10)/F with the CODATA 2018 exact
#: values R = 8.314462618 J/(mol·K), F = 96485.33212 C/mol, T = 298.15 K.
GAS_CONSTANT = 8.314462618
FARADAY = 96485.33212


def nernst_slope_mv(temperature_c: float | Array) -> float | Array:
    """Ideal electrode slope in mV per pH unit at a temperature in °C."""
    return 1000.0 * GAS_CONSTANT * (np.asarray(temperature_c) + 273.15) * math.log(10) / FARADAY


def diurnal(time: Array, amplitude: float, peak_hour: float) -> Array:
    """A daily cycle peaking at `peak_hour` UTC."""
    hours = (time % DAY) / 3600.0
    return amplitude * np.cos(2 * math.pi * (hours - peak_hour) / 24.0)


def no2_station(days: float = 60, step: float = 600, seed: int = 7) -> dict[str, Array]:
    """An electrochemical NO2 cell (ppb) at a roadside air-quality station of our own.

    Drift: slow linear zero creep plus a settling exponential; cross-sensitivity to
    temperature (quadratic about 20 °C). A co-located reference analyser reports every
    hour (`reference`); the cell reports every `step` seconds.
    """
    rng = np.random.default_rng(seed)
    time = START + np.arange(0, days * DAY, step)
    age = (time - START) / DAY
    temperature = 12 + diurnal(time, 6, 15) + rng.normal(0, 0.4, time.size)
    truth = 18 + 10 * np.clip(np.sin(math.pi * (time % DAY) / DAY), 0, None) ** 2
    truth = truth + rng.gamma(2.0, 2.0, time.size)
    drift = (
        0.12 * age
        + 4 * np.exp(-age / 3)
        + 0.03 * (temperature - 20) ** 2
        - 0.4 * (temperature - 20)
    )
    value = truth + drift + rng.normal(0, 1.0, time.size)
    reference = np.full(time.size, np.nan)
    hourly = (time % 3600) == 0
    reference[hourly] = truth[hourly] + rng.normal(0, 0.3, int(hourly.sum()))
    return {
        "time": time,
        "value": value,
        "temperature": temperature,
        "reference": reference,
        "truth_value": truth,
        "truth_drift": drift,
    }


def ph_river(
    days: float = 56,
    step: float = 900,
    seed: int = 11,
    efficiency: tuple[float, float] = (0.98, 0.90),
) -> dict[str, Array]:
    """A glass pH electrode (mV) in a river monitoring kiosk of our own.

    Logged in mV. The electrode's offset drifts slowly and its slope falls from 98 % to
    about 90 % of the Nernst slope over the run (ageing); once a week a technician dips it
    in pH 7 and pH 4 buffers (readings flagged with `check_value`, the buffer's pH).
    The channel learns raw_mV = a(T)·pH + offset(t) and publishes pH = corrected.
    `efficiency` is the slope's fraction of the Nernst slope at the start and the end.
    """
    rng = np.random.default_rng(seed)
    time = START + np.arange(0, days * DAY, step)
    age = (time - START) / DAY
    temperature = 11 + diurnal(time, 2.5, 16) + rng.normal(0, 0.1, time.size)
    ph = 7.6 + 0.25 * np.sin(2 * math.pi * (time % DAY) / DAY) + rng.normal(0, 0.03, time.size)
    efficiency_now = efficiency[0] + (efficiency[1] - efficiency[0]) * age / days
    slope = -nernst_slope_mv(temperature) * efficiency_now
    offset = 8.0 + 0.35 * age  # mV
    check = np.full(time.size, np.nan)
    weekly = [int(k) for k in np.nonzero(np.diff(np.floor(age / 7.0), prepend=-1) > 0)[0]]
    for k in weekly:  # two buffers, consecutive samples
        if k + 1 < time.size:
            check[k], check[k + 1] = 7.0, 4.0
            ph[k], ph[k + 1] = 7.0, 4.0
    value = slope * ph + offset + rng.normal(0, 0.15, time.size)
    return {
        "time": time,
        "value": value,
        "temperature": temperature,
        "check_value": check,
        "truth_value": ph,
        "truth_slope": slope,
        "truth_drift": offset,
    }


def load_cell(days: float = 30, step: float = 300, seed: int = 5) -> dict[str, Array]:
    """An unloaded reference load cell (kg) beside a silo scale of our own.

    It carries no load, so its true reading is 0 (learn mode `all`, nominal 0); the zero
    creeps and follows the temperature of the steel (1.5 kg/°C about 15 °C), plus a
    settling exponential after installation. A few knocks give outliers.
    """
    rng = np.random.default_rng(seed)
    time = START + np.arange(0, days * DAY, step)
    age = (time - START) / DAY
    temperature = 15 + diurnal(time, 7, 14) + rng.normal(0, 0.2, time.size)
    drift = 2.0 + 0.05 * age + 1.5 * (temperature - 15) + 3.0 * np.exp(-age / 2.0)
    value = drift + rng.normal(0, 0.5, time.size)
    knocks = rng.choice(time.size, size=6, replace=False)
    value[knocks] += rng.choice([-1, 1], 6) * rng.uniform(30, 80, 6)
    return {
        "time": time,
        "value": value,
        "temperature": temperature,
        "truth_value": np.zeros(time.size),
        "truth_drift": drift,
    }


def conductivity_fouling(
    days: float = 28, step: float = 900, seed: int = 13, cleaned_at: float = 16.0
) -> dict[str, Array]:
    """A conductivity cell (µS/cm) in the same river kiosk: biofilm fouling lowers its
    reading by a growing amount until a technician cleans it on day `cleaned_at`.

    Every two days a calibration standard of 1413 µS/cm is measured (`standard`, a payload
    field);
    the channel learns the fouling offset from those checks and from nothing else.
    """
    rng = np.random.default_rng(seed)
    time = START + np.arange(0, days * DAY, step)
    age = (time - START) / DAY
    since_clean = np.where(age < cleaned_at, age, age - cleaned_at)
    truth = 480 + 60 * np.sin(2 * math.pi * age / 9.0) + rng.normal(0, 3, time.size)
    drift = -1.5 * since_clean - 0.04 * since_clean**2
    standard = np.full(time.size, np.nan)
    checks = np.nonzero(np.diff(np.floor(age / 2.0), prepend=-1) > 0)[0]
    standard[checks] = 1413.0
    truth[checks] = 1413.0
    value = truth + drift + rng.normal(0, 2.0, time.size)
    return {
        "time": time,
        "value": value,
        "standard": standard,
        "truth_value": truth,
        "truth_drift": drift,
        "cleaned_at": np.array([START + cleaned_at * DAY]),
    }


def dissolved_oxygen(days: float = 28, step: float = 900, seed: int = 17) -> dict[str, Array]:
    """An optical dissolved-oxygen sensor (mg/L) whose zero follows the water temperature
    (0.08 mg/L per °C about 15 °C) and creeps slowly. Once a day, at 03:00 UTC, an air-purge
    zero check reads it against a known 0 (`zero`, a payload field)."""
    rng = np.random.default_rng(seed)
    time = START + np.arange(0, days * DAY, step)
    age = (time - START) / DAY
    temperature = 13 + diurnal(time, 2.0, 16) + 2.0 * np.sin(2 * math.pi * age / 20)
    truth = 9.5 + 1.2 * np.sin(2 * math.pi * (time % DAY) / DAY) + rng.normal(0, 0.05, time.size)
    drift = 0.08 * (temperature - 15) + 0.02 * age
    zero = np.where((time % DAY) == 3 * 3600, 0.0, np.nan)
    truth = np.where(np.isnan(zero), truth, 0.0)
    value = truth + drift + rng.normal(0, 0.03, time.size)
    return {
        "time": time,
        "value": value,
        "temperature": temperature,
        "zero": zero,
        "truth_value": truth,
        "truth_drift": drift,
    }


def write_csv(path: str | Path, columns: Mapping[str, Array], names: list[str]) -> None:
    """Write the named columns as a log CSV (NaN as a blank cell)."""
    with open(path, "w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(names)
        for row in zip(*(columns[name] for name in names), strict=True):
            writer.writerow(
                [
                    "" if math.isnan(v) else (f"{v:.0f}" if n == "time" else f"{v:.6g}")
                    for n, v in zip(names, row, strict=True)
                ]
            )
