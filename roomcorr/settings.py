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
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from roomcorr.checked import checked_number, loads_toml, read_regular_bytes, regular_file
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

#: Filter file formats a design can be written in (``wav`` is always written).
FILTER_FORMATS = ("wav", "multiwav", "f32", "f64", "txt")
#: Linkwitz-Riley slopes offered for the subwoofer crossover, dB per octave.
CROSSOVER_SLOPES_DB_OCT = (12, 24, 48)
#: Most loudspeaker channels one design handles.
MAX_CHANNELS = 8
#: Characters allowed in a channel name (it becomes part of file names).
_NAME_CHARS = frozenset("abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789-_")


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
    align : bool or None
        Bake per-channel delays and level trims into the filters. ``None``
        (default) does so whenever more than one channel is measured;
        ``False`` leaves the filters without them and lists them as trims.
    channel_names : tuple of str or None
        Name of each measured channel, in file order.
    subwoofer : str or None
        Name of the channel that is a subwoofer (it gets the low-pass, the
        others the high-pass of the crossover).
    crossover_range_hz : (float, float)
        Frequencies the subwoofer crossover may be chosen from.
    crossover_slope_db_oct : int
        Linkwitz-Riley slope: 12, 24 (default) or 48 dB per octave.
    level_band_hz : (float, float)
        Band over which the main loudspeakers' levels are matched.
    sub_level_band_hz : (float, float) or None
        Band of the subwoofer's level match; ``None`` chooses its own band
        below the crossover range.
    formats : tuple of str
        Filter file formats written (see :data:`FILTER_FORMATS`); ``wav``
        (one file per channel and rate) is always written.
    phase : str
        ``"minimum"`` (no added latency) or ``"mixed"`` (also undo the
        loudspeaker's excess phase, late by ``latency_ms``).
    latency_ms : float
        Latency budget, ms: how late a mixed-phase design makes the sound, and how
        early several subwoofers' shaped feeds may act (the mains then wait as long).
    speaker_low_hz : float or None
        The loudspeakers' own low-frequency limit (e.g. their -3 dB corner);
        below it the filters never raise the drive. ``None`` puts the limit
        at the measured roll-off or an assumed 80 Hz, whichever is higher.
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
    align: bool | None = None
    channel_names: tuple[str, ...] | None = None
    subwoofer: str | None = None
    crossover_range_hz: tuple[float, float] = (50.0, 150.0)
    crossover_slope_db_oct: int = 24
    level_band_hz: tuple[float, float] = (500.0, 2000.0)
    sub_level_band_hz: tuple[float, float] | None = None
    formats: tuple[str, ...] = ("wav",)
    phase: str = "minimum"
    latency_ms: float = 20.0
    speaker_low_hz: float | None = None


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


#: A preset name: letters, digits, ``-`` and ``_`` only (no separators, no dots).
_PRESET_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9_-]*")


def is_preset_name(spec: str) -> bool:
    """True if ``spec`` has the form of a preset name (never of a path)."""
    return bool(_PRESET_NAME.fullmatch(spec))


def find_preset(name: str) -> Path | None:
    """Return the bundled preset called ``name``, or ``None``.

    Only a plain name (:func:`is_preset_name`) can name a preset, and the file
    found must lie inside the presets folder: ``../pyproject`` is never a preset.
    """
    if not is_preset_name(name):
        return None
    folder = presets_dir().resolve()
    p = (folder / f"{name}.toml").resolve()
    if p.parent != folder or not p.is_file():
        return None
    return p


def read_toml(path: str | Path) -> dict[str, Any]:
    """Read a TOML file, turning every failure into a :class:`SettingsError`.

    Only regular files are opened (a FIFO would block for ever).
    """
    p = Path(path)
    raw = read_regular_bytes(p, "settings file", SettingsError)
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        raise SettingsError(f"{p}: not valid TOML (not UTF-8 text)") from None
    return loads_toml(text, str(p), SettingsError)  # deep nesting refused in one line


_DESIGN_FIELDS = {f.name: f for f in dataclasses.fields(DesignSettings)}

#: Range of every numeric design setting (inclusive), checked finite as well.
NUMBER_RANGES: dict[str, tuple[float, float, str]] = {
    "band_lo_hz": (10.0, 24000.0, "Hz"),
    "band_hi_hz": (10.0, 24000.0, "Hz"),
    "max_boost_db": (0.0, BOOST_LIMIT_DB, "dB"),
    "max_cut_db": (0.0, CUT_LIMIT_DB, "dB"),
    "taps": (256, 262144, "taps"),
    "ceiling_db": (-40.0, GAIN_CEILING_LIMIT_DB, "dB"),
    "position_weights": (0.0, 1e6, ""),
    "iir_sections": (1, 32, "sections"),
    "iir_freq_range_hz": (10.0, 24000.0, "Hz"),
    "iir_gain_range_db": (-CUT_LIMIT_DB, BOOST_LIMIT_DB, "dB"),
    "iir_q_range": (0.05, 50.0, ""),
    "temperature_c": (-30.0, 60.0, "°C"),
    "latency_ms": (*LATENCY_RANGE_MS, "ms"),
    "crossover_range_hz": (20.0, 300.0, "Hz"),
    "level_band_hz": (10.0, 24000.0, "Hz"),
    "sub_level_band_hz": (10.0, 24000.0, "Hz"),
    "speaker_low_hz": (10.0, 1000.0, "Hz"),
}
_INTEGER_KEYS = {"taps", "iir_sections", "sample_rates"}
_HINTS = {
    "max_boost_db": "large boosts cost headroom and driver excursion",
    "latency_ms": "sound through a mixed-phase filter, or several subwoofers' shaped feeds, "
    "is late by this much",
}


def _num(key: str, value: Any) -> float:
    """One design number, finite and in :data:`NUMBER_RANGES` (any type refused but numbers)."""
    if isinstance(value, str):  # numbers in a settings file are TOML numbers, not text
        raise SettingsError(f"design.{key}: expected a number, got {value!r}")
    lo, hi, unit = NUMBER_RANGES.get(key, (None, None, ""))
    return checked_number(
        value,
        f"design.{key}",
        lo,
        hi,
        integer=key in _INTEGER_KEYS,
        unit=unit,
        hint=_HINTS.get(key, ""),
    )


def subwoofer_names(subwoofer: str | None) -> list[str]:
    """The subwoofers named by ``design.subwoofer`` (comma-separated; empty for none)."""
    return [] if not subwoofer else subwoofer.split(",")


def _coerce_system(key: str, value: Any) -> Any:
    """Coerce the several-loudspeaker keys (align, names, subwoofer, crossover, formats)."""
    if key == "align":
        if value in (None, "auto"):
            return None
        if not isinstance(value, bool):
            raise SettingsError(f'design.align: expected true, false or "auto", got {value!r}')
        return value
    if key in ("channel_names", "formats"):
        if value is None and key == "channel_names":
            return None
        if isinstance(value, str):
            value = [v.strip() for v in value.split(",")]
        if not isinstance(value, list | tuple) or not value:
            raise SettingsError(f"design.{key}: expected a list of names")
        if not all(isinstance(v, str) for v in value):
            raise SettingsError(f"design.{key}: expected names (text), got {value!r}")
        return tuple(value)
    if key == "subwoofer":
        if value in (None, ""):
            return None
        if isinstance(value, list | tuple) and value and all(isinstance(v, str) for v in value):
            value = ",".join(value)
        if not isinstance(value, str):
            raise SettingsError(
                f"design.subwoofer: expected a channel name or a list of names, got {value!r}"
            )
        names = [v.strip() for v in value.split(",")]
        if not all(names) or len(set(names)) != len(names):
            raise SettingsError(
                f"design.subwoofer: {value!r}: give each subwoofer's channel name once, "
                "separated by commas"
            )
        return ",".join(names)
    if key == "crossover_slope_db_oct":
        if isinstance(value, bool) or not isinstance(value, int | float) or value != int(value):
            raise SettingsError(
                f"design.crossover_slope_db_oct: expected a whole number, got {value!r}"
            )
        return int(value)
    if key == "sub_level_band_hz":
        if value in (None, "auto"):
            return None
        if not isinstance(value, list | tuple) or len(value) != 2:
            raise SettingsError("design.sub_level_band_hz: expected two numbers [low, high]")
        return (float(_num(key, value[0])), float(_num(key, value[1])))
    raise KeyError(key)


_SYSTEM_KEYS = (
    "align",
    "channel_names",
    "subwoofer",
    "crossover_slope_db_oct",
    "sub_level_band_hz",
    "formats",
)


def _coerce(key: str, value: Any) -> Any:
    if key in _SYSTEM_KEYS:
        return _coerce_system(key, value)
    default = getattr(DesignSettings(), key)
    if key in ("band_lo_hz", "band_hi_hz", "speaker_low_hz"):
        return None if value in (None, "auto") else float(_num(key, value))
    if key in ("calibration",):
        if value in (None, ""):
            return None
        if not isinstance(value, str):
            raise SettingsError(f"design.calibration: expected a file name, got {value!r}")
        return value
    if key == "target":
        if not isinstance(value, str) or not value:
            raise SettingsError(f"design.target: expected a preset name or file, got {value!r}")
        return value
    if key == "taps":
        if value in (None, "auto"):
            return None
        return int(_num(key, value))
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
        return int(_num(key, value))
    if key == "sample_rates":
        if isinstance(value, int | float) and not isinstance(value, bool):
            value = [value]
        if not isinstance(value, list | tuple) or not value:
            raise SettingsError("design.sample_rates: expected a list of rates in Hz")
        return tuple(int(_num(key, v)) for v in value)
    if key == "position_weights":
        if value is None:
            return None
        if not isinstance(value, list | tuple) or not value:
            raise SettingsError("design.position_weights: expected a list of numbers")
        return tuple(float(_num(key, v)) for v in value)
    if isinstance(default, tuple):
        if not isinstance(value, list | tuple) or len(value) != 2:
            raise SettingsError(f"design.{key}: expected two numbers [low, high]")
        return (float(_num(key, value[0])), float(_num(key, value[1])))
    return float(_num(key, value))


def validate_design(d: DesignSettings) -> DesignSettings:
    """Check ranges and relations; raise :class:`SettingsError` naming the key.

    Every number is checked finite and in range (:data:`NUMBER_RANGES`) here
    too, so settings built in code cannot carry ``NaN`` past the checks.
    """
    _num("max_boost_db", d.max_boost_db)
    _num("max_cut_db", d.max_cut_db)
    for key in ("band_lo_hz", "band_hi_hz", "speaker_low_hz"):
        v = getattr(d, key)
        if v is not None:
            _num(key, v)
    if d.band_lo_hz is not None and d.band_hi_hz is not None and d.band_lo_hz >= d.band_hi_hz:
        raise SettingsError("design.band_lo_hz must be below design.band_hi_hz")
    if d.taps is not None:
        _num("taps", d.taps)
    if not d.sample_rates:
        raise SettingsError("design.sample_rates: expected a list of rates in Hz")
    bad = [r for r in d.sample_rates if not isinstance(r, int) or r not in SUPPORTED_RATES]
    if bad:
        raise SettingsError(
            f"design.sample_rates: {bad[0]} Hz is not supported; choose from "
            + ", ".join(str(r) for r in SUPPORTED_RATES)
        )
    d.sample_rates = tuple(sorted(set(d.sample_rates)))
    if not isinstance(d.allow_gain, bool):
        raise SettingsError(f"design.allow_gain: expected true or false, got {d.allow_gain!r}")
    ceiling = checked_number(d.ceiling_db, "design.ceiling_db")  # finite before any '>'
    if ceiling > 0.0 and not d.allow_gain:
        raise SettingsError(
            f"design.ceiling_db = {ceiling:g}: a ceiling above 0 dB needs allow_gain "
            "(--allow-gain); filters with gain can clip and overload amplifiers"
        )
    _num("ceiling_db", ceiling)
    if d.position_weights is not None:
        if not d.position_weights:
            raise SettingsError("design.position_weights: expected a list of numbers")
        for w in d.position_weights:
            _num("position_weights", w)
        if not sum(d.position_weights) > 0:
            raise SettingsError("design.position_weights: at least one weight must be positive")
    _num("iir_sections", d.iir_sections)
    lo, hi = (_num("iir_freq_range_hz", v) for v in d.iir_freq_range_hz)
    if not lo < hi:
        raise SettingsError("design.iir_freq_range_hz: expected 10 <= low < high <= 24000")
    glo, ghi = (_num("iir_gain_range_db", v) for v in d.iir_gain_range_db)
    if not glo < ghi:
        raise SettingsError("design.iir_gain_range_db: expected low < high")
    d.iir_gain_range_db = (glo, min(ghi, d.max_boost_db))
    qlo, qhi = (_num("iir_q_range", v) for v in d.iir_q_range)
    if not qlo < qhi:
        raise SettingsError("design.iir_q_range: expected 0.05 <= low < high <= 50")
    d.latency_ms = _num("latency_ms", d.latency_ms)
    if d.phase not in PHASE_CHOICES:
        raise SettingsError(f"design.phase: expected one of {', '.join(PHASE_CHOICES)}")
    _num("temperature_c", d.temperature_c)
    validate_system(d)
    return d


def validate_system(d: DesignSettings) -> None:
    """Check the several-loudspeaker keys; raise :class:`SettingsError` naming the key."""
    if d.channel_names is not None:
        names = d.channel_names
        if len(names) > MAX_CHANNELS:
            raise SettingsError(
                f"design.channel_names: {len(names)} names; at most {MAX_CHANNELS} channels"
            )
        for n in names:
            if not n or not set(n) <= _NAME_CHARS or len(n) > 32:
                raise SettingsError(
                    f"design.channel_names: {n!r} is not a usable name; use letters, digits, "
                    "- and _ (at most 32)"
                )
        if len(set(names)) != len(names):
            raise SettingsError("design.channel_names: every channel needs its own name")
        for sub in subwoofer_names(d.subwoofer):
            if sub not in names:
                raise SettingsError(
                    f"design.subwoofer = {d.subwoofer!r}: {sub!r} is not one of the channel "
                    "names " + ", ".join(names)
                )
    lo, hi = d.crossover_range_hz
    if not (20.0 <= lo <= hi <= 300.0):
        raise SettingsError(
            f"design.crossover_range_hz = [{lo:g}, {hi:g}]: expected 20 <= low <= high <= 300 Hz"
        )
    if d.crossover_slope_db_oct not in CROSSOVER_SLOPES_DB_OCT:
        raise SettingsError(
            f"design.crossover_slope_db_oct = {d.crossover_slope_db_oct}: choose one of "
            + ", ".join(str(s) for s in CROSSOVER_SLOPES_DB_OCT)
            + " (Linkwitz-Riley 2nd, 4th or 8th order)"
        )
    for key in ("level_band_hz", "sub_level_band_hz"):
        band = getattr(d, key)
        if band is not None and not 10.0 <= band[0] < band[1] <= 24000.0:
            raise SettingsError(f"design.{key}: expected 10 <= low < high <= 24000 Hz")
    bad = [f for f in d.formats if f not in FILTER_FORMATS]
    if bad:
        raise SettingsError(
            f"design.formats: {bad[0]!r} is not a filter format; choose from "
            + ", ".join(FILTER_FORMATS)
        )
    d.formats = tuple(f for f in FILTER_FORMATS if f == "wav" or f in d.formats)


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


def resolve_relative_paths(d: DesignSettings, base_dir: str | Path) -> DesignSettings:
    """Make the file names of a settings file (calibration, target) relative to its folder.

    A target that is a bundled preset's name stays a name; any other target or
    calibration given as a relative path is joined to ``base_dir`` (the
    settings file's own folder), so a settings file means the same wherever
    roomcorr is started from.
    """
    base = Path(base_dir).resolve()
    if d.calibration and not Path(d.calibration).is_absolute():
        d.calibration = str(base / d.calibration)
    if d.target and find_preset(d.target) is None and not Path(d.target).is_absolute():
        d.target = str(base / d.target)
    return d


def settings_from_dict(
    data: dict[str, Any], source: str = "settings", base_dir: str | Path | None = None
) -> Settings:
    """Build :class:`Settings` from a parsed TOML mapping.

    ``base_dir`` is the folder of the file the mapping came from: relative
    calibration and target paths are resolved against it
    (:func:`resolve_relative_paths`).
    """
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
    if base_dir is not None:
        d = resolve_relative_paths(d, base_dir)
    return Settings(design=d, measure=dict(measure))


def load_settings(path: str | Path) -> Settings:
    """Load a settings file; a bare preset name finds the bundled preset.

    The file must be a regular file; relative paths inside it are relative to
    its own folder.
    """
    p = Path(path)
    preset = find_preset(str(path))
    if preset is not None and not p.exists():
        p = preset
    regular_file(p, "settings file", SettingsError)
    return settings_from_dict(read_toml(p), source=str(p), base_dir=p.parent)


def settings_to_dict(settings: Settings) -> dict[str, Any]:
    """Return a JSON/TOML-friendly mapping that :func:`settings_from_dict` reads back."""
    design = dataclasses.asdict(settings.design)
    for key, value in list(design.items()):
        if isinstance(value, tuple):
            design[key] = list(value)
    return {"settings_version": SETTINGS_VERSION, "design": design, "measure": settings.measure}
