"""Shared fixtures: protocol files written into tmp_path, the test double well's protocol, the repository's folders."""

import textwrap
from pathlib import Path

import numpy as np
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


# The test double well (5 kJ/mol, about 2 kT at 300 K): top-level key -> value text, or
# key -> {entry: value text} for a block mapping. double_well_protocol() writes it out.
_DOUBLE_WELL_KEYS = {
    "protocol": "1",
    "title": "test double well",
    "system": {"model": "{name: double_well, barrier: 5 kJ/mol, minimum: 0.1 nm, tilt: 1 kJ/mol}"},
    "seed": "5",
    "temperature": "300 K",
    "timestep": "2 fs",
    "coordinates": {"x": "{position: 0, axis: x}"},
    "run": {"cycle": "0.1 ps", "equilibration": "1 ps", "production": "5 ps", "frame_every": "1 ps"},
    "basins": {"left": "{x: [-1 nm, 0 nm]}", "right": "{x: [0 nm, 1 nm]}"},
}


def double_well_protocol(**changes):
    """The test double well's protocol text with top-level keys changed.

    Each keyword is a top-level protocol key. Text (or a number) replaces the key's value; a
    dict changes a block mapping entry by entry (``run={"production": "2 ps"}``) or makes a new
    one; None leaves a key or an entry out. New keys follow the others in the order given.
    """
    keys = {key: dict(value) if isinstance(value, dict) else value for key, value in _DOUBLE_WELL_KEYS.items()}
    for key, value in changes.items():
        if isinstance(value, dict) and isinstance(keys.get(key), dict):
            keys[key].update(value)
        else:
            keys[key] = value
    lines = []
    for key, value in keys.items():
        if isinstance(value, dict):
            lines += [f"{key}:"] + [f"  {entry}: {text}" for entry, text in value.items() if text is not None]
        elif value is not None:
            lines.append(f"{key}: {value}")
    return "\n".join(lines) + "\n"


DOUBLE_WELL = double_well_protocol()


@pytest.fixture
def double_well_text():
    return DOUBLE_WELL


# Four rungs 300-1500 K: walkers reach 1500 K (barrier about 2 kT there) every few
# picoseconds and carry their well down the ladder; 20 ps of equilibration lets the
# wells fill from the start in the left one.
SHORT_LADDER = """\
protocol: 1
title: short double-well temperature ladder
system: double-well-high
seed: 1
temperature: 300 K
timestep: 2 fs
friction: 5/ps
platform: {name: Reference, workers: 1}
coordinates:
  x: {position: 0, axis: x}
temperatures: {lowest: 300 K, highest: 1500 K, count: 4}
exchange: {pairs: adjacent}
run:
  cycle: 0.2 ps
  equilibration: 20 ps
  production: 300 ps
basins:
  left: {x: [-1 nm, 0 nm]}
  right: {x: [0 nm, 1 nm]}
"""


def exact_high_well_left_population():
    """exact: quadrature of exp(-U/kT) over each side of the bundled high double well at 300 K."""
    from boost.models import read_model
    from boost.spec import load_yaml

    model = read_model(load_yaml(REPO / "systems" / "double-well-high.yaml", what="system").get("model"))
    sides = {"left": {"x": (-np.inf, 0.0)}, "right": {"x": (0.0, np.inf)}}
    return model.compute_exact_populations(300.0, sides)["left"]


def run_stopped_before(protocol, folder, cycle):
    """Run ``protocol`` into ``folder`` and stop it as a kill would just before recording
    ``cycle``: the folder then holds cycles 0 to cycle - 1, as a run still going does."""
    from boost.scheduler import run_protocol
    from boost.store import Ledger

    real = Ledger.record_cycle

    def killed(self, at, **kwargs):
        if at == cycle:
            raise KeyboardInterrupt
        return real(self, at, **kwargs)

    Ledger.record_cycle = killed
    try:
        with pytest.raises(KeyboardInterrupt):
            run_protocol(protocol, folder, progress=False)
    finally:
        Ledger.record_cycle = real
    return folder
