"""Measurement settings (the ``[measure]`` table of a settings file).

Levels start low and are capped: the sweep's peak defaults to
``DEFAULT_LEVEL_DBFS`` and may not exceed ``LEVEL_CAP_DBFS`` unless
``allow_loud`` is set explicitly.
"""

from __future__ import annotations

import math
import re
from dataclasses import asdict, dataclass, fields
from typing import Any

from roomcorr.checked import checked_number
from roomcorr.errors import SafetyError, SettingsError

DEFAULT_LEVEL_DBFS = -20.0
LEVEL_CAP_DBFS = -6.0
#: Plausible microphone sensitivities, dBFS for 94 dB SPL (1 Pa). Outside this a
#: figure is a typing error (0 dBFS would mean 94 dB SPL already clips).
SENSITIVITY_RANGE_DBFS = (-80.0, -3.0)
#: Sweep level at the seat above which roomcorr warns: 75 to 85 dB SPL is plenty for
#: a domestic room measurement (common practice).
DEFAULT_MAX_SPL_DB = 85.0
#: A loudspeaker name: it becomes part of the filter files' names (``fir/48000/NAME.wav``);
#: the same characters as ``design.channel_names`` accepts.
_LOUDSPEAKER_NAME = re.compile(r"[A-Za-z0-9_-]{1,32}")


#: The value types a ``[measure]`` key may hold, by its field's annotation: a string
#: ``"5"`` where a number belongs is refused, not compared with numbers later.
_FIELD_TYPES: dict[str, set[str]] = {
    "int": {"int"},
    "float": {"float"},
    "bool": {"bool"},
    "str": {"str"},
    "str | int | None": {"str", "int", "None"},
    "bool | None": {"bool", "None"},
    "int | None": {"int", "None"},
    "float | None": {"float", "None"},
    "tuple[int, ...]": {"tuple"},
    "tuple[int, int] | None": {"tuple", "None"},
    "tuple[str, ...] | None": {"tuple", "None"},
}
_TYPE_WORDS = {
    "int": "a whole number",
    "float": "a number",
    "bool": "true or false",
    "str": "text",
    "str | int | None": "a device name or number",
    "bool | None": "true or false",
    "int | None": "a whole number",
    "float | None": "a number",
    "tuple[int, ...]": "a list of whole numbers",
    "tuple[int, int] | None": "two whole numbers",
    "tuple[str, ...] | None": "a list of names",
}


@dataclass
class MeasureSettings:
    """Everything a measurement run needs besides the output folder.

    Channel numbers are 1-based as printed on interfaces.
    """

    sample_rate: int = 48000
    f_start_hz: float = 20.0
    f_end_hz: float = 20000.0
    sweep_s: float = 5.0  # requested; the synchronised sweep is a little shorter/longer
    level_dbfs: float = DEFAULT_LEVEL_DBFS  # sweep peak level
    allow_loud: bool = False  # needed for level_dbfs above LEVEL_CAP_DBFS
    fade_in_s: float = 0.05
    fade_out_s: float = 0.005
    noise_s: float = 1.0  # noise-only recording before the first sweep
    tail_s: float = 1.5  # silence after each sweep (decay + latency)
    repeats: int = 2
    ir_s: float = 1.0  # length of the saved impulse responses
    harmonics: int = 5  # highest harmonic order analysed
    method: str = "division"  # deconvolution inverse: "division" or "analytic"
    test_level_dbfs: float = -40.0  # quiet level check before the first sweep
    test_s: float = 1.0
    device: str | int | None = None
    input_device: str | int | None = None  # microphone's device when it differs from device
    output_device: str | int | None = None  # loudspeakers' device when it differs from device
    two_streams: bool | None = None  # separate play and record streams (default: devices differ)
    reference: int | None = None  # output of the timing-reference loudspeaker (default: first)
    markers: bool = True  # timing markers before and after the sweeps
    max_drift_ppm: float = 500.0  # clock mismatch above this stops the run unless --force
    mic_sensitivity_dbfs: float | None = None  # dBFS for 94 dB SPL (1 Pa) at the microphone
    max_spl_db: float = DEFAULT_MAX_SPL_DB  # warn when the sweep is louder at the seat
    outputs: tuple[int, ...] = (1, 2)
    input: int = 1
    loopback: tuple[int, int] | None = None  # (output, input) joined by a cable
    names: tuple[str, ...] | None = None  # loudspeaker names, one per output (--names)
    positions: int = 1
    blocksize: int = 0  # 0 = let the audio system choose
    # gate limits
    clip_dbfs: float = -0.1
    min_peak_dbfs: float = -50.0
    min_snr_db: float = 20.0
    max_dc_offset: float = 0.01
    min_arrival_db: float = 25.0
    max_repeat_disagreement_db: float = -20.0

    def validate(self) -> None:
        """Check ranges and the level cap; raise SettingsError / SafetyError."""
        if self.sample_rate < 8000:
            raise SettingsError(f"measure.sample_rate = {self.sample_rate}: use at least 8000 Hz")
        if not 0 < self.f_start_hz < self.f_end_hz < self.sample_rate / 2:
            raise SettingsError(
                f"measure sweep band {self.f_start_hz}..{self.f_end_hz} Hz: need "
                f"0 < f_start_hz < f_end_hz < {self.sample_rate / 2:g} (half the sample rate)"
            )
        if not 0.1 <= self.sweep_s <= 120:
            raise SettingsError(f"measure.sweep_s = {self.sweep_s}: use 0.1 to 120 s")
        if self.level_dbfs > 0:
            raise SafetyError(f"measure.level_dbfs = {self.level_dbfs}: cannot exceed 0 dBFS")
        if self.level_dbfs > LEVEL_CAP_DBFS and not self.allow_loud:
            raise SafetyError(
                f"measure.level_dbfs = {self.level_dbfs} dBFS is above the {LEVEL_CAP_DBFS} dBFS "
                "cap; start lower, or pass --allow-loud if you are sure (protect your hearing "
                "and the loudspeakers)"
            )
        if self.test_level_dbfs > min(self.level_dbfs, LEVEL_CAP_DBFS):
            raise SafetyError("measure.test_level_dbfs must be below the sweep level")
        if self.repeats < 1 or self.positions < 1 or self.harmonics < 1:
            raise SettingsError("measure.repeats, positions and harmonics must be at least 1")
        if self.ir_s <= 0 or self.noise_s < 0.1 or self.tail_s < self.ir_s + 0.1:
            raise SettingsError(
                "measure: need ir_s > 0, noise_s >= 0.1 s and tail_s >= ir_s + 0.1 s "
                "(the silence after a sweep must hold the room's decay and the latency)"
            )
        if self.method not in ("division", "analytic"):
            raise SettingsError(f"measure.method = {self.method!r}: use 'division' or 'analytic'")
        chans = list(self.outputs) + [self.input]
        if self.loopback is not None:
            if len(self.loopback) != 2:
                raise SettingsError("--loopback needs OUT,IN (two channel numbers)")
            chans += list(self.loopback)
            if self.loopback[0] in self.outputs:
                raise SettingsError("--loopback output must not be a loudspeaker output")
            if self.loopback[1] == self.input:
                raise SettingsError("--loopback input must differ from the microphone input")
        if self.names is not None and len(self.names) != len(self.outputs):
            raise SettingsError(
                f"--names gives {len(self.names)} names for {len(self.outputs)} outputs; "
                "give one name per --outputs channel"
            )
        for name in self.names or ():
            if not _LOUDSPEAKER_NAME.fullmatch(str(name)):  # names become filter file names
                raise SettingsError(
                    f"--names: {name!r} is not a plain name; use letters, digits, - and _ "
                    "(at most 32)"
                )
        if not self.outputs or any(int(c) < 1 for c in chans):
            raise SettingsError("channel numbers start at 1 (--outputs, --input, --loopback)")
        if self.reference is not None:
            if int(self.reference) < 1:
                raise SettingsError("--reference: channel numbers start at 1")
            if self.loopback is not None and self.reference == self.loopback[0]:
                raise SettingsError("--reference must be a loudspeaker output, not the loopback")
        if self.loopback is not None and self.two_streams:
            raise SettingsError(
                "--loopback needs one device for input and output (one stream); with two "
                "devices the acoustic timing reference (--reference) takes its place"
            )
        if not (math.isfinite(self.max_drift_ppm) and 1.0 <= self.max_drift_ppm <= 5000.0):
            raise SettingsError(f"measure.max_drift_ppm = {self.max_drift_ppm}: use 1 to 5000")
        sens = self.mic_sensitivity_dbfs
        lo, hi = SENSITIVITY_RANGE_DBFS
        if sens is not None and not (math.isfinite(sens) and lo <= sens <= hi):
            raise SettingsError(
                f"microphone sensitivity {sens} dBFS for 94 dB SPL is not plausible (expected "
                f"{lo:g} to {hi:g}); check --mic-sensitivity or the calibration file header"
            )
        if not (math.isfinite(self.max_spl_db) and 60.0 <= self.max_spl_db <= 110.0):
            raise SettingsError(f"measure.max_spl_db = {self.max_spl_db}: use 60 to 110 dB SPL")
        if self.blocksize < 0 or self.blocksize > 65536:
            raise SettingsError(f"--blocksize {self.blocksize}: use 0 (automatic) to 65536")

    @property
    def reference_output(self) -> int:
        """Output channel of the timing-reference loudspeaker."""
        return int(self.reference) if self.reference is not None else int(self.outputs[0])

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["outputs"] = list(self.outputs)
        d["loopback"] = list(self.loopback) if self.loopback else None
        return d

    @classmethod
    def from_dict(cls, data: dict[str, Any], source: str = "[measure]") -> MeasureSettings:
        """Build from a settings table; unknown keys are an error naming ``source``."""
        names = {f.name for f in fields(cls)}
        unknown = set(data) - names
        if unknown:
            raise SettingsError(f"{source}: unknown measure keys {sorted(unknown)}")
        d = dict(data)

        for f in fields(cls):  # each value of its field's type, every number finite
            if f.name not in d:
                continue
            v = d[f.name]
            allowed = _FIELD_TYPES.get(str(f.type))
            if allowed is None:  # pragma: no cover - a field added without its type here
                raise TypeError(f"MeasureSettings.{f.name}: no type check for {f.type}")
            name = f"{source}: measure.{f.name}"
            if v is None and "None" in allowed:
                continue
            if "tuple" in allowed:
                kind = str if str(f.type).startswith("tuple[str") else int
                if not isinstance(v, list | tuple) or not all(
                    isinstance(x, kind) and not isinstance(x, bool) for x in v
                ):
                    what = "names" if kind is str else "whole numbers"
                    raise SettingsError(f"{name} = {v!r}: expected a list of {what}")
                continue
            if isinstance(v, bool):
                if "bool" not in allowed:
                    raise SettingsError(f"{name} = {v!r}: expected a number, not true/false")
                continue
            if isinstance(v, int | float):
                if "float" in allowed or "int" in allowed:
                    d[f.name] = checked_number(v, name, integer="float" not in allowed)
                    continue
            elif isinstance(v, str) and "str" in allowed:
                continue
            raise SettingsError(f"{name} = {v!r}: expected {_TYPE_WORDS[str(f.type)]}")
        for key in ("outputs", "loopback", "names"):  # lists in TOML and JSON, tuples here
            if d.get(key) is not None:
                d[key] = tuple(d[key])
        s = cls(**d)
        s.validate()
        return s
