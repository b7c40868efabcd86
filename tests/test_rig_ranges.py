"""Every number of a rig file is finite and plausible, else one line naming file, key and range.

Each case is the shipped larch preset with one number replaced; the values are the ones that
used to be accepted (NaN/inf scales gave 0 events) or crashed (teeth = 100000 asked for tens of
GiB). The plausible ranges are common practice for road engines and sensors (from memory).
"""

from __future__ import annotations

from importlib import resources
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from crankbeat.errors import RigError
from crankbeat.logger.rig import load_rig
from crankbeat.logger.rig.schema import RANGES

Larch = resources.files("crankbeat.logger.presets").joinpath("larch.toml").read_text("utf-8")

CASES = {
    "teeth huge": ("teeth = 60", "teeth = 100000", "wheel.teeth", "8 .. 720"),
    "teeth float": ("teeth = 60", "teeth = 1e12", "wheel.teeth", "an integer"),
    "bore 1e308": ("bore_mm = 84.0", "bore_mm = 1e308", "engine.bore_mm", "10 .. 500 mm"),
    "inertia inf": ("inertia_kgm2 = 0.021", "inertia_kgm2 = inf", "engine.inertia_kgm2",
                    "finite"),
    "inertia nan": ("inertia_kgm2 = 0.021", "inertia_kgm2 = nan", "engine.inertia_kgm2",
                    "finite"),
    "tolerance nan": ("interval_tolerance_deg = 3.0", "interval_tolerance_deg = nan",
                      "limits.interval_tolerance_deg", "0.01 .. 90 deg"),
    "period scale nan": ("scale = 0.25e-6", "scale = nan", "can.message[0].signal[2].scale",
                         "finite"),
    "period scale inf": ("scale = 0.25e-6", "scale = -inf", "can.message[0].signal[2].scale",
                         "finite"),
    "sample rate inf": ("sample_rate_hz = 2000.0", "sample_rate_hz = inf",
                        "serial[0].sample_rate_hz", "1 .. 100000 Hz"),
}


def _write(tmp_path: Path, old: str, new: str) -> Path:
    assert Larch.count(old) >= 1, old
    p = tmp_path / "bad.toml"
    p.write_text(Larch.replace(old, new, 1), encoding="utf-8")
    return p


@pytest.mark.parametrize("case", list(CASES))
def test_implausible_number_is_one_line_with_file_key_and_range(tmp_path, case):
    old, new, key, expected = CASES[case]
    path = _write(tmp_path, old, new)
    with pytest.raises(RigError) as info:
        load_rig(path)
    text = str(info.value)
    assert "\n" not in text, text
    assert text.startswith(f"{path}: {key}"), text
    assert expected in text, text
    assert info.value.exit_code == 3


def test_the_shipped_presets_are_within_every_range():
    for name in ("larch", "alder"):
        load_rig(name)  # raises if a shipped value were outside its range


@settings(max_examples=60, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(key=st.sampled_from(["teeth", "bore_mm", "sample_rate_hz", "idle_rpm", "baud"]),
       value=st.one_of(st.floats(allow_nan=True, allow_infinity=True),
                       st.integers(min_value=-(2**70), max_value=2**70)))
def test_any_number_either_loads_within_range_or_is_refused_cleanly(tmp_path, key, value):
    lines = Larch.splitlines()
    at = next(i for i, ln in enumerate(lines) if ln.strip().startswith(f"{key} ="))
    text = repr(value) if not isinstance(value, float) else (
        "nan" if value != value else ("inf" if value == float("inf") else
                                      "-inf" if value == float("-inf") else repr(value)))
    lines[at] = f"{key} = {text}"
    path = tmp_path / "fz.toml"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    lo, hi, _ = RANGES[key]
    try:
        load_rig(path)
    except RigError as exc:
        assert str(exc).startswith(str(path)), exc
        return
    assert lo <= value <= hi  # loaded: then it was plausible
