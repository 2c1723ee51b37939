"""Settings: TOML load, validation, presets, round trip."""

from __future__ import annotations

import pytest

from roomcorr.errors import SettingsError
from roomcorr.settings import (
    DesignSettings,
    Settings,
    design_from_dict,
    load_settings,
    preset_names,
    settings_from_dict,
    settings_to_dict,
)


def test_defaults_are_safe():
    d = DesignSettings()
    assert d.ceiling_db == 0.0 and not d.allow_gain
    # Boost cap of a few dB (common practice: about 3 to 6 dB).
    assert 3.0 <= d.max_boost_db <= 6.0
    assert d.sample_rates == (44100, 48000, 96000)


def test_unknown_key_is_named():
    with pytest.raises(SettingsError, match="max_bost_db"):
        design_from_dict({"max_bost_db": 3})


@pytest.mark.parametrize(
    ("key", "value", "msg"),
    [
        ("max_boost_db", 20, "max_boost_db"),
        ("max_boost_db", "x", "max_boost_db"),
        ("ceiling_db", 2.0, "allow_gain"),
        ("sample_rates", [22050], "22050"),
        ("taps", 10, "taps"),
        ("band_lo_hz", 5, "band_lo_hz"),
    ],
)
def test_bad_values_are_refused(key, value, msg):
    with pytest.raises(SettingsError, match=msg):
        design_from_dict({key: value})


def test_gain_needs_explicit_permission():
    d = design_from_dict({"ceiling_db": 2.0, "allow_gain": True})
    assert d.ceiling_db == 2.0


def test_band_order():
    with pytest.raises(SettingsError, match="band_lo_hz must be below"):
        design_from_dict({"band_lo_hz": 500, "band_hi_hz": 200})


def test_iir_gain_range_never_above_boost_cap():
    d = design_from_dict({"max_boost_db": 2.0})
    assert d.iir_gain_range_db[1] == 2.0


def test_round_trip_through_toml(tmp_path):
    s = Settings(design=design_from_dict({"target": "gentle-tilt", "max_boost_db": 3.0}))
    data = settings_to_dict(s)
    lines = ["settings_version = 1", "[design]"]
    for k, v in data["design"].items():
        if v is None:
            continue
        lines.append(
            f"{k} = {v!r}".replace("True", "true").replace("False", "false").replace("'", '"')
        )
    p = tmp_path / "s.toml"
    p.write_text("\n".join(lines))
    back = load_settings(p)
    assert back.design == s.design


def test_presets_present_and_loadable():
    names = preset_names()
    assert {"flat", "gentle-tilt", "warm-seat", "design-cautious"} <= set(names)
    s = load_settings("design-cautious")
    assert s.design.max_boost_db == 2.0


def test_newer_version_refused():
    with pytest.raises(SettingsError, match="settings_version"):
        settings_from_dict({"settings_version": 99})


def test_bad_toml(tmp_path):
    p = tmp_path / "bad.toml"
    p.write_text("[design\nx=")
    with pytest.raises(SettingsError, match="bad.toml"):
        load_settings(p)
