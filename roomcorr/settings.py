"""Settings for a design (and the measurement section), TOML load and validation.

A settings file holds everything needed to repeat a design exactly::

    settings_version = 1

    [design]
    target = "gentle-tilt"
    max_boost_db = 4.0
    sample_rates = [44100, 48000, 96000]

    [measure]
    # measurement keys, validated by roomcorr.measure

Unknown keys and out-of-range values raise :class:`~roomcorr.errors.SettingsError`
naming the key. Preset names (files in ``presets/``) can stand for a path.
"""

from __future__ import annotations

import dataclasses
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from roomcorr.errors import SettingsError

#: Version of the settings-file layout written and understood by this release.
SETTINGS_VERSION = 1

#: Sample rates a design can be exported at.
SUPPORTED_RATES = (44100, 48000, 88200, 96000, 176400, 192000)
DEFAULT_RATES = (44100, 48000, 96000)

#: Hard limits no settings file can lift (a user asking for more is refused).
BOOST_LIMIT_DB = 12.0
CUT_LIMIT_DB = 40.0
GAIN_CEILING_LIMIT_DB = 6.0


@dataclass
class DesignSettings:
    """Every choice that shapes a correction design.

    Attributes
    ----------
    target : str
        Preset name from ``presets/`` or path to a text file of frequency/dB pairs.
    band_lo_hz, band_hi_hz : float or None
        Correction band; ``None`` finds the edge from the measured roll-off.
    max_boost_db, max_cut_db : float
        Largest boost and cut the correction may apply.
    taps : int or None
        FIR length at 48 kHz; other rates keep the same duration. ``None``
        chooses a length that resolves the lowest corrected frequency.
    sample_rates : tuple of int
        Rates to export FIR (and IIR) filters at.
    ceiling_db : float
        Largest peak gain of any exported filter. Above 0 dB only with
        ``allow_gain``.
    allow_gain : bool
        Permit a ceiling above 0 dB (a warning is printed).
    calibration : str or None
        Microphone calibration file (frequency and dB per line).
    position_weights : tuple of float or None
        Weight per measurement position in the power average.
    iir, iir_sections, iir_freq_range_hz, iir_gain_range_db, iir_q_range
        Biquad output and the ranges its sections may use.
    temperature_c : float
        Air temperature, for the speed of sound.
    phase : str
        ``"minimum"`` (no added latency) or ``"mixed"`` (also undo the
        loudspeaker's excess phase, late by ``latency_ms``).
    latency_ms : float
        Latency budget of a mixed-phase design, ms.
    """

    target: str = "flat"
    band_lo_hz: float | None = None
    band_hi_hz: float | None = None
    max_boost_db: float = 4.0
    max_cut_db: float = 15.0
    taps: int | None = None
    sample_rates: tuple[int, ...] = DEFAULT_RATES
    ceiling_db: float = 0.0
    allow_gain: bool = False
    calibration: str | None = None
    position_weights: tuple[float, ...] | None = None
    iir: bool = False
    iir_sections: int = 10
    iir_freq_range_hz: tuple[float, float] = (20.0, 16000.0)
    iir_gain_range_db: tuple[float, float] = (-15.0, 4.0)
    iir_q_range: tuple[float, float] = (0.3, 12.0)
    temperature_c: float = 20.0
    phase: str = "minimum"
    latency_ms: float = 20.0


#: Choices of ``DesignSettings.phase``.
PHASE_CHOICES = ("minimum", "mixed")
#: Range of ``DesignSettings.latency_ms``.
LATENCY_RANGE_MS = (5.0, 250.0)


@dataclass
class Settings:
    """All settings: the design section and the (raw) measurement section."""

    design: DesignSettings = field(default_factory=DesignSettings)
    measure: dict[str, Any] = field(default_factory=dict)


def presets_dir() -> Path:
    """Return the folder holding the bundled presets."""
    here = Path(__file__).resolve().parent
    for cand in (here / "presets", here.parent / "presets"):
        if cand.is_dir():
            return cand
    raise SettingsError("the bundled presets folder is missing; reinstall roomcorr")


def preset_names() -> list[str]:
    """Names of the bundled presets (file names without ``.toml``)."""
    return sorted(p.stem for p in presets_dir().glob("*.toml"))


def find_preset(name: str) -> Path | None:
    """Return the preset file called ``name``, or ``None``."""
    p = presets_dir() / f"{name}.toml"
    return p if p.is_file() else None


def read_toml(path: str | Path) -> dict[str, Any]:
    """Read a TOML file, turning every failure into a :class:`SettingsError`."""
    p = Path(path)
    try:
        with open(p, "rb") as fh:
            return tomllib.load(fh)
    except FileNotFoundError:
        raise SettingsError(f"{p}: settings file not found") from None
    except tomllib.TOMLDecodeError as exc:
        raise SettingsError(f"{p}: not valid TOML ({exc})") from None
    except OSError as exc:
        raise SettingsError(f"{p}: cannot read ({exc.strerror})") from None


_DESIGN_FIELDS = {f.name: f for f in dataclasses.fields(DesignSettings)}


def _as_float(key: str, value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise SettingsError(f"design.{key}: expected a number, got {value!r}")
    return float(value)


def _coerce(key: str, value: Any) -> Any:
    default = getattr(DesignSettings(), key)
    if key in ("band_lo_hz", "band_hi_hz"):
        return None if value in (None, "auto") else _as_float(key, value)
    if key in ("calibration",):
        return None if value in (None, "") else str(value)
    if key == "target":
        if not isinstance(value, str) or not value:
            raise SettingsError(f"design.target: expected a preset name or file, got {value!r}")
        return value
    if key == "taps":
        if value in (None, "auto"):
            return None
        if isinstance(value, bool) or not isinstance(value, int):
            raise SettingsError(f"design.taps: expected a whole number, got {value!r}")
        return int(value)
    if key == "phase":
        if value not in PHASE_CHOICES:
            raise SettingsError(
                f"design.phase: expected one of {', '.join(PHASE_CHOICES)}, got {value!r}"
            )
        return value
    if key in ("allow_gain", "iir"):
        if not isinstance(value, bool):
            raise SettingsError(f"design.{key}: expected true or false, got {value!r}")
        return value
    if key == "iir_sections":
        if isinstance(value, bool) or not isinstance(value, int):
            raise SettingsError(f"design.iir_sections: expected a whole number, got {value!r}")
        return int(value)
    if key == "sample_rates":
        if isinstance(value, int):
            value = [value]
        if not isinstance(value, list | tuple) or not value:
            raise SettingsError("design.sample_rates: expected a list of rates in Hz")
        return tuple(int(_as_float(key, v)) for v in value)
    if key == "position_weights":
        if value is None:
            return None
        if not isinstance(value, list | tuple) or not value:
            raise SettingsError("design.position_weights: expected a list of numbers")
        return tuple(_as_float(key, v) for v in value)
    if isinstance(default, tuple):
        if not isinstance(value, list | tuple) or len(value) != 2:
            raise SettingsError(f"design.{key}: expected two numbers [low, high]")
        return (_as_float(key, value[0]), _as_float(key, value[1]))
    return _as_float(key, value)


def validate_design(d: DesignSettings) -> DesignSettings:
    """Check ranges and relations; raise :class:`SettingsError` naming the key."""
    if not 0.0 <= d.max_boost_db <= BOOST_LIMIT_DB:
        raise SettingsError(
            f"design.max_boost_db = {d.max_boost_db:g}: must lie between 0 and "
            f"{BOOST_LIMIT_DB:g} dB (large boosts cost headroom and driver excursion)"
        )
    if not 0.0 <= d.max_cut_db <= CUT_LIMIT_DB:
        raise SettingsError(
            f"design.max_cut_db = {d.max_cut_db:g}: must lie between 0 and {CUT_LIMIT_DB:g} dB"
        )
    for key in ("band_lo_hz", "band_hi_hz"):
        v = getattr(d, key)
        if v is not None and not 10.0 <= v <= 24000.0:
            raise SettingsError(f"design.{key} = {v:g}: must lie between 10 Hz and 24 kHz")
    if d.band_lo_hz is not None and d.band_hi_hz is not None and d.band_lo_hz >= d.band_hi_hz:
        raise SettingsError("design.band_lo_hz must be below design.band_hi_hz")
    if d.taps is not None and not 256 <= d.taps <= 262144:
        raise SettingsError(f"design.taps = {d.taps}: must lie between 256 and 262144")
    bad = [r for r in d.sample_rates if r not in SUPPORTED_RATES]
    if bad:
        raise SettingsError(
            f"design.sample_rates: {bad[0]} Hz is not supported; choose from "
            + ", ".join(str(r) for r in SUPPORTED_RATES)
        )
    d.sample_rates = tuple(sorted(set(d.sample_rates)))
    if d.ceiling_db > 0.0 and not d.allow_gain:
        raise SettingsError(
            f"design.ceiling_db = {d.ceiling_db:g}: a ceiling above 0 dB needs allow_gain "
            "(--allow-gain); filters with gain can clip and overload amplifiers"
        )
    if d.ceiling_db > GAIN_CEILING_LIMIT_DB or d.ceiling_db < -40.0:
        raise SettingsError(
            f"design.ceiling_db = {d.ceiling_db:g}: must lie between -40 and "
            f"{GAIN_CEILING_LIMIT_DB:g} dB"
        )
    if d.position_weights is not None and any(w < 0 for w in d.position_weights):
        raise SettingsError("design.position_weights: weights must not be negative")
    if d.position_weights is not None and sum(d.position_weights) <= 0:
        raise SettingsError("design.position_weights: at least one weight must be positive")
    if not 1 <= d.iir_sections <= 32:
        raise SettingsError(f"design.iir_sections = {d.iir_sections}: must lie between 1 and 32")
    lo, hi = d.iir_freq_range_hz
    if not 10.0 <= lo < hi <= 24000.0:
        raise SettingsError("design.iir_freq_range_hz: expected 10 <= low < high <= 24000")
    glo, ghi = d.iir_gain_range_db
    if not glo < ghi:
        raise SettingsError("design.iir_gain_range_db: expected low < high")
    d.iir_gain_range_db = (glo, min(ghi, d.max_boost_db))
    qlo, qhi = d.iir_q_range
    if not 0.05 <= qlo < qhi <= 50.0:
        raise SettingsError("design.iir_q_range: expected 0.05 <= low < high <= 50")
    lat_lo, lat_hi = LATENCY_RANGE_MS
    if not (math.isfinite(d.latency_ms) and lat_lo <= d.latency_ms <= lat_hi):
        raise SettingsError(
            f"design.latency_ms = {d.latency_ms:g}: must lie between {lat_lo:g} and "
            f"{lat_hi:g} ms (sound through a mixed-phase filter is late by this much)"
        )
    if d.phase not in PHASE_CHOICES:
        raise SettingsError(f"design.phase: expected one of {', '.join(PHASE_CHOICES)}")
    if not -30.0 <= d.temperature_c <= 60.0:
        raise SettingsError(f"design.temperature_c = {d.temperature_c:g}: expected -30 to 60 °C")
    return d


def design_from_dict(values: dict[str, Any], base: DesignSettings | None = None) -> DesignSettings:
    """Build validated design settings from a ``[design]`` table over ``base``."""
    d = dataclasses.replace(base) if base is not None else DesignSettings()
    for key, value in values.items():
        if key not in _DESIGN_FIELDS:
            raise SettingsError(
                f"design.{key}: unknown setting; known keys are " + ", ".join(_DESIGN_FIELDS)
            )
        setattr(d, key, _coerce(key, value))
    return validate_design(d)


def settings_from_dict(data: dict[str, Any], source: str = "settings") -> Settings:
    """Build :class:`Settings` from a parsed TOML mapping."""
    version = data.get("settings_version", SETTINGS_VERSION)
    if not isinstance(version, int) or version > SETTINGS_VERSION or version < 1:
        raise SettingsError(
            f"{source}: settings_version = {version!r} is not understood by this release "
            f"(it reads version 1 to {SETTINGS_VERSION}); upgrade roomcorr"
        )
    unknown = set(data) - {"settings_version", "design", "measure", "room"}
    if unknown:
        raise SettingsError(f"{source}: unknown section or key {sorted(unknown)[0]!r}")
    design = data.get("design", {})
    measure = data.get("measure", {})
    if not isinstance(design, dict) or not isinstance(measure, dict):
        raise SettingsError(f"{source}: [design] and [measure] must be tables")
    try:
        d = design_from_dict(design)
    except SettingsError as exc:
        raise SettingsError(f"{source}: {exc}") from None
    return Settings(design=d, measure=dict(measure))


def load_settings(path: str | Path) -> Settings:
    """Load a settings file; a bare preset name finds the bundled preset."""
    p = Path(path)
    if not p.exists() and p.suffix == "" and find_preset(str(path)) is not None:
        p = find_preset(str(path))  # type: ignore[assignment]
    return settings_from_dict(read_toml(p), source=str(p))


def settings_to_dict(settings: Settings) -> dict[str, Any]:
    """Return a JSON/TOML-friendly mapping that :func:`settings_from_dict` reads back."""
    design = dataclasses.asdict(settings.design)
    for key, value in list(design.items()):
        if isinstance(value, tuple):
            design[key] = list(value)
    return {"settings_version": SETTINGS_VERSION, "design": design, "measure": settings.measure}
