"""Shared fixtures: protocol files written into tmp_path, the repository's folders."""

import textwrap
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture
def repo():
    return REPO


@pytest.fixture
def write_protocol(tmp_path):
    """Write a protocol (dedented text) as tmp_path/NAME and return its path."""

    def write(text, name="protocol.yaml"):
        path = tmp_path / name
        path.write_text(textwrap.dedent(text))
        return path

    return write


DOUBLE_WELL = """\
protocol: 1
title: test double well
system:
  model: {name: double_well, barrier: 5 kJ/mol, minimum: 0.1 nm, tilt: 1 kJ/mol}
seed: 5
temperature: 300 K
timestep: 2 fs
coordinates:
  x: {position: 0, axis: x}
run:
  cycle: 0.1 ps
  equilibration: 1 ps
  production: 5 ps
  frame_every: 1 ps
basins:
  left: {x: [-1 nm, 0 nm]}
  right: {x: [0 nm, 1 nm]}
"""


@pytest.fixture
def double_well_text():
    return DOUBLE_WELL
