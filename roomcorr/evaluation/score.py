"""Score a correction on an evaluation room: figures per seat, ratios per room.

Designs go through the same code path as ``roomcorr design``: the measured
seats are written as WAV files, read back with
:func:`roomcorr.audio_io.read_ir_set` and designed with
:func:`roomcorr.pipeline.run_design`; the 48 kHz filters it exports are then
applied to every seat (measured and held out) by convolution.
"""

from __future__ import annotations

import tempfile
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyfar as pf

from roomcorr.audio_io import read_ir_set
from roomcorr.design.realise.fir import fir_response_db
from roomcorr.evaluation.metrics import (
    bass_drive_db,
    broadband_db,
    peak_db,
    pre_ringing_db,
    ripple_db,
    steady_state_db,
)
from roomcorr.evaluation.simulate import EvaluationRoom, write_measured_wavs
from roomcorr.grid import log_grid
from roomcorr.pipeline import run_design
from roomcorr.settings import Settings

#: Sample rate whose exported filters are scored.
SCORE_FS = 48000


@dataclass
class SeatFigures:
    """Figures of every seat and channel, shape (n_seats, n_channels) each."""

    ripple_db: np.ndarray
    peak_db: np.ndarray
    broadband_db: np.ndarray


@dataclass
class RoomScore:
    """Uncorrected and corrected figures of one room for one design method."""

    room: str
    before: dict[str, SeatFigures]
    after: dict[str, SeatFigures]
    bass_drive_db: np.ndarray
    pre_ringing_db: np.ndarray
    peak_gain_db: np.ndarray
    info: dict = field(default_factory=dict)

    def ratio(self, figure: str, seats: str) -> float:
        """Mean corrected / mean uncorrected over seats and channels."""
        a = getattr(self.after[seats], figure)
        b = getattr(self.before[seats], figure)
        return float(np.mean(a) / np.mean(b))

    def worst_seat_ratio(self, figure: str, seats: str) -> float:
        """Largest per-seat ratio (channels averaged per seat)."""
        a = getattr(self.after[seats], figure).mean(axis=1)
        b = getattr(self.before[seats], figure).mean(axis=1)
        return float(np.max(a / b))

    def delta(self, figure: str, seats: str) -> float:
        """Largest increase (dB) of a figure over channels, seat mean."""
        a = getattr(self.after[seats], figure).mean(axis=0)
        b = getattr(self.before[seats], figure).mean(axis=0)
        return float(np.max(a - b))


def seat_figures(
    irs: np.ndarray, fs: int, corner_hz: np.ndarray, firs: np.ndarray | None
) -> SeatFigures:
    """Figures at every seat of ``irs`` (n_seats, n_channels, n_samples)."""
    freq = log_grid()
    n_seats, n_ch, _ = irs.shape
    out = {k: np.empty((n_seats, n_ch)) for k in ("ripple", "peak", "broadband")}
    for c in range(n_ch):
        h = None if firs is None else firs[c]
        sixth = steady_state_db(irs[:, c], fs, freq, 1.0 / 6.0, h)
        third = steady_state_db(irs[:, c], fs, freq, 1.0 / 3.0, h)
        out["ripple"][:, c] = ripple_db(sixth, freq, corner_hz[c])
        out["peak"][:, c] = peak_db(sixth, freq, corner_hz[c])
        out["broadband"][:, c] = broadband_db(third, freq)
    return SeatFigures(out["ripple"], out["peak"], out["broadband"])


def score_filters(room: EvaluationRoom, firs: np.ndarray, info: dict | None = None) -> RoomScore:
    """Score 48 kHz filters ``firs`` (n_channels, n_taps) on every seat of ``room``."""
    if room.fs != SCORE_FS:
        raise ValueError(f"evaluation rooms are scored at {SCORE_FS} Hz")
    freq = log_grid()
    before, after = {}, {}
    for seats, irs in (("measured", room.measured), ("held_out", room.held_out)):
        before[seats] = seat_figures(irs, room.fs, room.corner_hz, None)
        after[seats] = seat_figures(irs, room.fs, room.corner_hz, firs)
    drive = np.array(
        [
            bass_drive_db(fir_response_db(h, room.fs, freq), freq, fc)
            for h, fc in zip(firs, room.corner_hz, strict=True)
        ]
    )
    fir_db = np.array([fir_response_db(h, room.fs, freq) for h in firs])
    audible = (freq >= 20.0) & (freq <= 20000.0)
    return RoomScore(
        room=room.name,
        before=before,
        after=after,
        bass_drive_db=drive,
        pre_ringing_db=np.array([pre_ringing_db(h, room.fs) for h in firs]),
        peak_gain_db=fir_db[:, audible].max(axis=1),
        info=info or {},
    )


def design_like_cli(room: EvaluationRoom, settings: Settings, folder: str | Path | None = None):
    """Design for ``room``'s measured seats the way ``roomcorr design`` does.

    Returns
    -------
    DesignResult
    """

    with tempfile.TemporaryDirectory() as tmp:
        where = Path(folder) if folder is not None else Path(tmp)
        paths = write_measured_wavs(room, where)
        irs, fs, _ = read_ir_set([str(p) for p in paths])
        return run_design(irs, fs, settings)


def score_roomcorr(room: EvaluationRoom, settings: Settings | None = None) -> RoomScore:
    """Design with roomcorr (default settings unless given) and score the result."""
    settings = settings or Settings()
    result = design_like_cli(room, settings)
    info = {"band_hz": [ch.band_hz for ch in result.channels], "pre_gain_db": result.pre_gain_db}
    if all(getattr(ch, "speaker_low_hz", None) is not None for ch in result.channels):
        info["speaker_low"] = [(ch.speaker_low_hz, ch.speaker_low_how) for ch in result.channels]
    if all(getattr(ch, "prediction", None) is not None for ch in result.channels):
        info["prediction"] = [
            (ch.prediction.uncorrected_db, ch.prediction.predicted_db) for ch in result.channels
        ]
        # What actually happens at the held-out seats over the prediction's band.
        freq = log_grid()
        firs = result.firs[SCORE_FS]
        actual = []
        for ch in result.channels:
            lo, hi = ch.prediction.band_hz
            m = (freq >= lo) & (freq <= hi)
            irs = room.held_out[:, ch.index]
            vals = []
            for h in (None, firs[ch.index]):
                x = steady_state_db(irs, room.fs, freq, 1 / 6, h)[:, m]
                vals.append(
                    float(np.mean(np.sqrt(np.mean((x - x.mean(1, keepdims=True)) ** 2, 1))))
                )
            actual.append(tuple(vals))
        info["held_out_variation"] = actual
    return score_filters(room, result.firs[SCORE_FS], info)


def naive_inversion_firs(room: EvaluationRoom, freq_range_hz=(20.0, 20000.0)) -> np.ndarray:
    """The naive baseline: regularised inversion of the centre seat, then minimum phase.

    ``pyfar.dsp.regularized_spectrum_inversion`` (Kirkeby et al. 1998) of
    the whole centre-seat response of each channel, made minimum phase with
    ``pyfar.dsp.minimum_phase``, then scaled to a 0 dB peak like every
    roomcorr filter.

    Returns
    -------
    firs : ndarray, shape (n_channels, n_taps)
    """

    centre = pf.Signal(room.measured[0], room.fs)
    with warnings.catch_warnings():  # the function is renamed in pyfar 0.10
        warnings.simplefilter("ignore")
        inv = pf.dsp.regularized_spectrum_inversion(centre, freq_range_hz)
    h = pf.dsp.minimum_phase(inv, truncate=False).time
    freq = log_grid()
    audible = (freq >= 20.0) & (freq <= 20000.0)
    peak = max(float(np.max(fir_response_db(x, room.fs, freq)[audible])) for x in h)
    return h * 10.0 ** (-peak / 20.0)
