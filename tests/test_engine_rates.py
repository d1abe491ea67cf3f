"""The per-machine rates file (`_engine/rates.py`): measured once and kept, read back by a new
process, measured again when damaged or stale, turned off; and the formation-rate lookup.

The measurement itself is stubbed (`rates_file`): these tests check the file and the lookup, not
the machine. `FIXED` (tests/helpers.py `FIXED_RATES`) are the pinned rates the planner tests
share.
"""

from __future__ import annotations

import dataclasses
import json

import pytest
from helpers import FIXED_RATES as FIXED

from ntkcalc._engine import rates as R


@pytest.fixture
def rates_file(tmp_path, monkeypatch):
    path = tmp_path / "rates.json"
    monkeypatch.setenv(R.ENV_FILE, str(path))
    monkeypatch.setattr(R, "_KEPT", {})
    measured = []

    def measure(*, dtype="float32", device=None):
        measured.append(dtype)
        return dataclasses.replace(FIXED, dtype=dtype, source="measured")

    monkeypatch.setattr(R, "measure_rates", measure)
    return path, measured


def test_rates_file_round_trip(rates_file, monkeypatch):
    path, measured = rates_file
    first = R.default_rates("float64")
    assert measured == ["float64"] and first.source == f"measured, kept in {path}"
    saved = json.loads(path.read_text())
    assert saved["version"] == R.FILE_VERSION
    assert list(saved["rates"]) == [R.machine_key("float64")]
    monkeypatch.setattr(R, "_KEPT", {})  # a new process
    again = R.default_rates("float64")
    assert measured == ["float64"] and again.source == f"file {path}"
    assert again.as_dict() == first.as_dict()
    R.default_rates("float32")  # another dtype: its own entry
    assert measured == ["float64", "float32"] and len(json.loads(path.read_text())["rates"]) == 2


@pytest.mark.parametrize("damage", ["not json {", '{"version": 0, "rates": {}}', "entry"])
def test_damaged_rates_file_is_measured_again(rates_file, monkeypatch, damage):
    path, measured = rates_file
    if damage == "entry":
        R.default_rates("float64")
        monkeypatch.setattr(R, "_KEPT", {})
        data = json.loads(path.read_text())
        data["rates"][R.machine_key("float64")]["matmul"] = "fast"
        damage = json.dumps(data)
        measured.clear()
    path.write_text(damage)
    got = R.default_rates("float64")
    assert measured == ["float64"] and got.source.startswith("measured")
    assert json.loads(path.read_text())["rates"][R.machine_key("float64")]["matmul"] == 5e10


def test_rates_file_can_be_turned_off(rates_file, monkeypatch, tmp_path):
    path, measured = rates_file
    monkeypatch.setenv(R.ENV_FILE, "off")
    assert R.rates_file() is None
    assert R.default_rates("float64").source == "measured" and not path.exists()
    monkeypatch.setenv(R.ENV_FILE, str(path))
    R.default_rates("float64", file=False)
    assert not path.exists()


def test_formation_rate_lookup():
    # Inner sizes round up to a power of two and take the nearest measured size at or above.
    assert FIXED.formation_at(1) == 1e9
    assert FIXED.formation_at(9) == 1e10 and FIXED.formation_at(16) == 1e10
    assert FIXED.formation_at(17) == 4e10 and FIXED.formation_at(10**6) == 4e10
