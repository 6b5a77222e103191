"""The one-line status of a running run: progress, time left, swap acceptance, window drift."""

import math

import pytest

import boost.run_status
from boost.conditions import Condition
from boost.protocol import load_protocol
from boost.run_status import RunStatus
from boost.scheduler import run_protocol
from conftest import double_well_protocol

R = 8.314462618e-3   # kJ/mol/K (CODATA 2018)


class Clock:
    def __init__(self):
        self.now = 0.0

    def __call__(self):
        return self.now


def test_time_left_and_swap_acceptance():
    clock = Clock()
    ladder = [Condition(0, 300.0), Condition(1, 330.0), Condition(2, 360.0)]
    status = RunStatus(ladder, [], n_cycles=60, start_cycle=0, every=5, clock=clock)
    for cycle in range(10):
        clock.now += 1.0
        # 2 attempts per cycle, 1 accepted in even cycles: 5 of 20 in all
        status.add(cycle, [0, 1, 2], [[], [], []], [(0, 1, 1, cycle % 2 == 0), (1, 2, 1, 0)])
    assert status.due()
    # exact: 10 cycles in 10 s, 50 cycles left -> 50 s
    line = status.line(10)
    assert line.startswith("cycle 10 of 60 (17 %), about 50 s left")
    assert "25% of 20 swap attempts accepted" in line
    assert not status.due()           # the tallies start again after each line


def test_window_drift_in_spring_widths_wraps_on_a_circle():
    clock = Clock()
    spring = 100.0                                    # kJ/mol/rad²
    width = math.sqrt(R * 300.0 / spring)             # exact: sqrt(kT/k)
    windows = [Condition(0, 300.0, (math.radians(170.0),), (spring,)), Condition(1, 300.0, (0.0,), (spring,))]
    status = RunStatus(windows, [True], n_cycles=10, start_cycle=0, every=0, clock=clock)
    # walker 0 holds the window at 170° and sits at -170°: 20° away across ±180°, not 340°;
    # walker 1 sits 2 widths from 0
    status.add(0, [0, 1], [[math.radians(-170.0)], [2 * width]], [])
    clock.now = 1.0
    expected = (math.radians(20.0) / width + 2.0) / 2
    assert f"walkers {expected:.1f} spring widths from their window centres" in status.line(1)


def test_boost_run_prints_status_lines(tmp_path, monkeypatch, capsys):
    monkeypatch.setattr(boost.run_status, "EVERY_SECONDS", 0.0)
    text = double_well_protocol(umbrella={"x": "{centres: [-0.1 nm, 0.1 nm], spring: 2000 kJ/mol/nm**2}"},
                                run={"production": "1 ps", "frame_every": None})
    (tmp_path / "p.yaml").write_text(text)
    run_protocol(load_protocol(tmp_path / "p.yaml"), tmp_path / "run", progress=True)
    lines = [line for line in capsys.readouterr().err.splitlines() if line.startswith("cycle ")]
    assert lines and "spring widths from their window centres" in lines[-1]
    assert lines[-1].startswith("cycle 20 of 20 (100 %)")
