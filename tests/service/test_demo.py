"""The demo scenario: the generator keeps the physics it promises, and `mixscore demo`
finds the injected faults through a real server and fit worker."""

from __future__ import annotations

import io
import re

import numpy as np

from service.demo import MODEL, run_demo
from service.demo_data import (
    CUT_IN_M_S,
    FEATURES,
    RATED_KW,
    RATED_M_S,
    monitoring_day,
    operating_records,
)
from service.embedded import EmbeddedRedis

from .servers import api_process, worker_process


def test_the_generator_keeps_its_physics() -> None:
    records = operating_records(3, seed=5)
    wind, power, rotor, oil, ambient, vibration = records.points.T
    assert records.points.shape == (3 * 144 * 12, len(FEATURES))
    assert set(records.regime) == {"idling", "partial load", "near rated", "rated"}
    partial = (wind > CUT_IN_M_S + 0.5) & (wind < RATED_M_S - 1)
    cube = RATED_KW * (wind**3 - CUT_IN_M_S**3) / (RATED_M_S**3 - CUT_IN_M_S**3)
    assert np.median(np.abs(power[partial] / cube[partial] - 1)) < 0.05
    rated = (wind > RATED_M_S + 1) & (wind < 24)
    assert abs(np.median(power[rated]) - RATED_KW) < 20
    # Oil temperature follows power and ambient: a least-squares fit explains most of it.
    design = np.column_stack([np.ones_like(power), power, ambient])
    residual = oil - design @ np.linalg.lstsq(design, oil, rcond=None)[0]
    assert residual.var() < 0.1 * oil.var()
    assert np.corrcoef(vibration, rotor)[0, 1] > 0.9
    assert not np.isnan(records.points).any()


def test_a_monitoring_day_has_faults_and_dropouts_and_is_reproducible() -> None:
    day, again = monitoring_day(seed=3), monitoring_day(seed=3)
    assert np.array_equal(day.points, again.points, equal_nan=True)
    gaps = np.isnan(day.points)
    assert gaps.any(axis=1).sum() == int(0.02 * len(day.points))
    assert (gaps.sum(axis=1) <= 1).all()
    assert (day.fault != "").sum() == int(0.02 * len(day.points))
    assert not (gaps.any(axis=1) & (day.fault != "")).any()


def test_the_demo_fits_promotes_and_finds_the_faults(redis_server: EmbeddedRedis) -> None:
    out = io.StringIO()
    with api_process(redis_server.url, "demo-test") as url, \
            worker_process(redis_server.url, "demo-test"):
        assert run_demo(url, None, fit_only=False, out=out) == 0
        again = io.StringIO()
        run_demo(url, None, fit_only=True, out=again)
    text = out.getvalue()
    assert f"{MODEL}: version 1 promoted" in text
    assert again.getvalue() == f"demo model {MODEL!r}: serving version 1\n"
    caught, faulty, alarms, healthy = (int(n.replace(",", "")) for n in re.search(
        r"below 0.001: (\d+) of (\d+) records with an injected fault, and ([\d,]+) of "
        r"([\d,]+) healthy", text).groups())  # type: ignore[union-attr]
    assert caught >= 0.7 * faulty
    assert alarms <= 0.01 * healthy
    table = text.split("lowest tail fraction first):\n")[1].split("\n\n")[0].splitlines()[2:]
    assert len(table) == 12
    assert sum(line.split()[-1] != "-" for line in table) >= 10, "mostly injected faults"
    assert "filled" in text and "not a protection system" in text
