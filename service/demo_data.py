"""Invented records of a wind farm's condition monitoring, for the demo (seeded).

Each record is a 10-minute summary of one turbine: wind speed, electrical power,
rotor speed, gearbox oil temperature, ambient temperature and drive-train vibration.
The turbines are imaginary 2 MW machines; the relations are the usual ones:

* power rises with the cube of wind speed from cut-in (3.5 m/s) to rated (12 m/s),
  then stays at 2000 kW until cut-out (25 m/s);
* the rotor idles below cut-in, turns in proportion to the wind in partial load,
  and holds its rated 16 rpm above;
* gearbox oil runs above ambient by a margin that grows with power;
* vibration grows with rotor speed.

Four operating regimes follow from the wind: idling, partial load, near rated and
rated. A monitoring day adds faults (gearbox overheating, rotor imbalance, power
shortfall) and sensor dropouts (NaN).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

FEATURES = ("wind_speed_m_s", "power_kw", "rotor_speed_rpm", "gearbox_oil_c",
            "ambient_c", "vibration_mm_s")
CUT_IN_M_S, RATED_M_S, CUT_OUT_M_S = 3.5, 12.0, 25.0
RATED_KW, RATED_RPM, IDLE_RPM = 2000.0, 16.0, 2.0
RECORDS_PER_DAY = 144  # one every 10 minutes
FAULTS = ("gearbox overheating", "rotor imbalance", "power shortfall")


@dataclass(frozen=True)
class Records:
    """Rows of ``points`` (columns: FEATURES) with what the generator knows of each:
    the turbine, the minute of the record, the regime and an injected fault ("")."""

    points: np.ndarray
    turbine: np.ndarray
    minute: np.ndarray
    regime: np.ndarray
    fault: np.ndarray


def regime_of(wind: np.ndarray) -> np.ndarray:
    names = np.array(["idling", "partial load", "near rated", "rated"])
    index = np.digitize(wind, [CUT_IN_M_S, 9.0, RATED_M_S])
    index[wind >= CUT_OUT_M_S] = 0
    return names[index]


def healthy(wind: np.ndarray, ambient: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Power, rotor speed, oil temperature and vibration of healthy turbines."""
    n = len(wind)
    share = np.clip((wind**3 - CUT_IN_M_S**3) / (RATED_M_S**3 - CUT_IN_M_S**3), 0.0, 1.0)
    running = (wind >= CUT_IN_M_S) & (wind < CUT_OUT_M_S)
    power = np.where(running, RATED_KW * share * (1 + 0.04 * rng.standard_normal(n)),
                     -8.0 + 12.0 * rng.standard_normal(n))  # idling draws a little
    power = np.minimum(power, RATED_KW * (1 + 0.01 * rng.standard_normal(n)))
    partial_rpm = 6.0 + (RATED_RPM - 6.0) * (wind - CUT_IN_M_S) / (RATED_M_S - CUT_IN_M_S)
    rotor = np.where(running, np.minimum(partial_rpm, RATED_RPM), IDLE_RPM * wind / CUT_IN_M_S)
    rotor = rotor + 0.3 * rng.standard_normal(n)
    oil = ambient + 18.0 + 0.012 * np.maximum(power, 0) + 1.2 * rng.standard_normal(n)
    vibration = (0.5 + 0.15 * rotor) * np.exp(0.08 * rng.standard_normal(n))
    return np.column_stack([power, rotor, oil, vibration])


def operating_records(days: int, turbines: int = 12, seed: int = 0) -> Records:
    """Healthy records of ``turbines`` turbines over ``days`` days: the training set."""
    rng = np.random.default_rng(seed)
    n = days * RECORDS_PER_DAY * turbines
    minute = np.repeat(np.arange(days * RECORDS_PER_DAY) * 10, turbines)
    turbine = np.tile(np.arange(1, turbines + 1), days * RECORDS_PER_DAY)
    # Wind varies by weather (a daily level) and gusts; ambient by season and hour.
    daily_scale = rng.uniform(5.0, 11.0, size=days).repeat(RECORDS_PER_DAY * turbines)
    wind = np.clip(daily_scale * rng.weibull(2.0, size=n), 0.2, 30.0)
    hour = (minute / 60.0) % 24
    ambient = (8.0 + 6.0 * np.sin(2 * np.pi * (minute / 1440.0) / 365.0)
               + 4.0 * np.sin(2 * np.pi * (hour - 9) / 24) + 1.5 * rng.standard_normal(n))
    power, rotor, oil, vibration = healthy(wind, ambient, rng).T
    points = np.column_stack([wind, power, rotor, oil, ambient, vibration])
    return Records(points, turbine, minute, regime_of(wind), np.full(n, "", dtype=object))


def monitoring_day(turbines: int = 12, seed: int = 1, fault_share: float = 0.02,
                   dropout_share: float = 0.02) -> Records:
    """One new day of records with faults injected into ``fault_share`` of the rows and
    one sensor missing (NaN) in ``dropout_share`` of them."""
    day = operating_records(1, turbines, seed)
    rng = np.random.default_rng(seed + 1000)
    points = day.points.copy()
    fault = day.fault.copy()
    n = len(points)
    running = np.flatnonzero(points[:, 0] > 6.0)
    chosen = rng.choice(running, size=max(1, int(fault_share * n)), replace=False)
    for row, kind in zip(chosen, rng.choice(FAULTS, size=len(chosen)), strict=True):
        fault[row] = kind
        if kind == "gearbox overheating":
            points[row, 3] += rng.uniform(12.0, 20.0)
        elif kind == "rotor imbalance":
            points[row, 5] = points[row, 5] * rng.uniform(2.0, 3.0) + 1.0
        else:
            points[row, 1] *= rng.uniform(0.45, 0.65)
    clean = np.setdiff1d(np.arange(n), chosen)
    dropped = rng.choice(clean, size=int(dropout_share * n), replace=False)
    points[dropped, rng.choice([3, 5], size=len(dropped))] = np.nan
    return Records(points, day.turbine, day.minute, day.regime, fault)
