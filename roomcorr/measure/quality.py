"""Quality figures and gates for sweep recordings.

Every figure is a pure function of arrays; :func:`evaluate_gates` turns the
figures into pass/fail records (stored in ``measurement.json``) and
:func:`raise_on_failure` stops a measurement with a clear message.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
from scipy.signal import periodogram

from roomcorr.analysis.bands import octave_centres_hz as centres
from roomcorr.errors import RoomcorrError


class QualityGateError(RoomcorrError):
    """A recording failed a quality gate (the message names the gate and the fix)."""


#: The headroom gate warns when the recording's peak is above this, dBFS. Common
#: practice: leave at least 3 dB between the loudest input sample and full scale, since
#: a louder moment (a closer position, another loudspeaker) would then clip; the
#: clipping gate itself stops at -0.1 dBFS.
HEADROOM_PEAK_DBFS = -3.0


def octave_centres_hz(f_lo_hz: float = 63.0, f_hi_hz: float = 8000.0) -> np.ndarray:
    """Octave mid-bands of IEC 61260-1:2014 (base 10) from nominal 63 Hz to 8 kHz by default.

    Delegates to :func:`roomcorr.analysis.bands.octave_centres_hz`.

    Returns
    -------
    ndarray, shape (n_bands,)
    """

    return centres(f_lo_hz, f_hi_hz)


def band_snr_db(
    sweep_part: np.ndarray,
    noise_part: np.ndarray,
    fs: int,
    f_start_hz: float,
    f_end_hz: float,
    centres_hz: np.ndarray | None = None,
    sweep_s: float | None = None,
) -> dict[float, float]:
    """Signal-to-noise ratio per octave band while the sweep passes through the band.

    Periodograms (rectangular window, so the sweep's first and last parts count
    fully) of the recording during the sweep and of the noise-only recording
    before it are integrated over each octave band (edges ``f_m * 10**(+-0.15)``).
    The sweep spends only the fraction ``ln(f_hi/f_lo) / ln(f_end/f_start)`` of
    its time in a band, so the signal power while it is there is the average
    divided by that fraction:
    ``SNR = 10 log10((P_sweep - P_noise) / (fraction * P_noise))``. When
    ``sweep_part`` is longer than the sweep (to include the system latency),
    ``sweep_s`` gives the sweep's own length and the power is scaled to it.

    Parameters
    ----------
    sweep_part : ndarray, shape (n,)
        Recording during the sweep.
    noise_part : ndarray, shape (m,)
        Noise-only recording.
    fs, f_start_hz, f_end_hz : sweep rate and band.
    centres_hz : ndarray, optional
        Band centres; default octaves 63 Hz .. 8 kHz that lie inside the sweep band.

    Returns
    -------
    dict
        ``{centre_hz: snr_db}`` (rounded centres as keys).
    """

    if centres_hz is None:
        centres_hz = octave_centres_hz()
    f, p_sig = periodogram(sweep_part, fs, window="boxcar")
    fn, p_noise = periodogram(noise_part, fs, window="boxcar")
    df, dfn = f[1] - f[0], fn[1] - fn[0]
    stretch = 1.0 if sweep_s is None else len(sweep_part) / (sweep_s * fs)
    out: dict[float, float] = {}
    half = 10.0**0.15
    total = np.log(f_end_hz / f_start_hz)
    for fm in centres_hz:
        lo, hi = fm / half, fm * half
        if lo < f_start_hz or hi > f_end_hz:
            continue
        ps = p_sig[(f >= lo) & (f < hi)].sum() * df
        pn = p_noise[(fn >= lo) & (fn < hi)].sum() * dfn
        frac = np.log(hi / lo) / total
        val = 10 * np.log10(max((ps - pn) * stretch, 1e-30) / max(frac * pn, 1e-30))
        out[round(float(fm), 1)] = float(min(val, 200.0))
    return out


def peak_dbfs(x: np.ndarray) -> float:
    """Peak level in dBFS (full scale 1.0)."""
    return float(20 * np.log10(max(float(np.max(np.abs(x))), 1e-12)))


def clipped_samples(x: np.ndarray, clip_dbfs: float = -0.1) -> int:
    """Number of samples at or above ``clip_dbfs``."""
    return int(np.count_nonzero(np.abs(x) >= 10 ** (clip_dbfs / 20)))


def arrival_snr_db(h: np.ndarray, n_ir: int, noise_region: slice) -> float:
    """Peak of the linear response over the robust noise level of the deconvolution.

    Noise level: ``1.4826 * median(|h|)`` over ``noise_region`` (a region of the
    circular deconvolution holding neither the linear nor any harmonic response).
    A disconnected loudspeaker gives about the extreme-value ratio of Gaussian
    noise, ``sqrt(2 ln n)`` (around 13 dB for 10^4 samples).
    """
    peak = float(np.max(np.abs(h[:n_ir])))
    noise = 1.4826 * float(np.median(np.abs(h[noise_region])))
    return float(20 * np.log10(max(peak, 1e-30) / max(noise, 1e-30)))


def repeat_disagreement_db(irs: np.ndarray) -> float:
    """Worst energy of one repeat's difference from the mean, relative to the mean, in dB.

    Parameters
    ----------
    irs : ndarray, shape (n_repeats, n)

    Returns
    -------
    float
        ``max_r 10 log10(sum (h_r - mean)^2 / sum mean^2)``; ``-inf`` for one repeat.
    """
    if irs.shape[0] < 2:
        return float("-inf")
    mean = irs.mean(axis=0)
    ref = max(float(np.sum(mean**2)), 1e-30)
    return float(max(10 * np.log10(max(np.sum((r - mean) ** 2), 1e-30) / ref) for r in irs))


@dataclass
class Gate:
    """One pass/fail check with its figure, limit and what to do."""

    name: str
    passed: bool
    value: float
    limit: float
    unit: str
    message: str
    #: ``"error"`` stops the run when not passed; ``"warning"`` is shown (summary,
    #: report, app) but lets the run carry on.
    severity: str = "error"

    def to_dict(self) -> dict:
        return asdict(self)


def evaluate_gates(figures: dict, limits: dict) -> list[Gate]:
    """Turn quality figures into gates.

    Parameters
    ----------
    figures : dict
        Keys ``clipped_samples``, ``peak_dbfs``, ``min_snr_db``, ``dc_offset``,
        ``stream_problems``, ``arrival_snr_db``, ``repeat_disagreement_db``.
    limits : dict
        Keys ``clip_dbfs``, ``min_peak_dbfs``, ``min_snr_db``, ``max_dc_offset``,
        ``min_arrival_db``, ``max_repeat_disagreement_db``.

    Returns
    -------
    list[Gate]
    """
    g = []
    f, lim = figures, limits
    g.append(
        Gate(
            "clipping",
            f["clipped_samples"] == 0,
            f["clipped_samples"],
            0,
            "samples",
            f"input clipping: {f['clipped_samples']} samples at or above "
            f"{lim['clip_dbfs']} dBFS; lower the input gain or the output level",
        )
    )
    g.append(
        Gate(
            "input_level",
            f["peak_dbfs"] >= lim["min_peak_dbfs"],
            f["peak_dbfs"],
            lim["min_peak_dbfs"],
            "dBFS",
            f"input too low: peak {f['peak_dbfs']:.1f} dBFS below "
            f"{lim['min_peak_dbfs']} dBFS; raise the microphone gain",
        )
    )
    peak_limit = float(lim.get("max_peak_dbfs", HEADROOM_PEAK_DBFS))
    g.append(
        Gate(
            "headroom",
            f["peak_dbfs"] <= peak_limit,  # NaN fails
            f["peak_dbfs"],
            peak_limit,
            "dBFS",
            f"input peak {f['peak_dbfs']:.1f} dBFS leaves less than {-peak_limit:g} dB of "
            "headroom; a louder position would clip: lower the microphone gain or the output "
            "level and measure again",
            severity="warning",
        )
    )
    g.append(
        Gate(
            "snr",
            f["min_snr_db"] >= lim["min_snr_db"],
            f["min_snr_db"],
            lim["min_snr_db"],
            "dB",
            f"signal-to-noise ratio {f['min_snr_db']:.1f} dB in the worst octave band is "
            f"below {lim['min_snr_db']} dB; reduce background noise, raise the level "
            "carefully or use a longer sweep",
        )
    )
    g.append(
        Gate(
            "dc_offset",
            abs(f["dc_offset"]) <= lim["max_dc_offset"],
            f["dc_offset"],
            lim["max_dc_offset"],
            "full scale",
            f"DC offset {f['dc_offset']:.4f} of full scale in the input; check the "
            "microphone power (phantom) and the interface",
        )
    )
    g.append(
        Gate(
            "buffers",
            f["stream_problems"] == 0,
            f["stream_problems"],
            0,
            "buffers",
            f"{f['stream_problems']} audio buffers dropped or repeated; close other audio "
            "programs or use a larger block size",
        )
    )
    g.append(
        Gate(
            "arrival",
            f["arrival_snr_db"] >= lim["min_arrival_db"],
            f["arrival_snr_db"],
            lim["min_arrival_db"],
            "dB",
            f"no arrival found (impulse peak only {f['arrival_snr_db']:.1f} dB above "
            "noise): is the loudspeaker connected, switched on and on the chosen output?",
        )
    )
    tref = f.get("timing_reference")
    if tref is not None and f.get("latency_s") is None:
        g.append(
            Gate(
                "timing_reference",
                bool(tref["found"]),
                tref["marker_snr_db"],
                0,
                "dB",
                f"timing marker of output {tref['reference_output']} not found in the "
                "recording: is the reference loudspeaker connected and on? (choose "
                "another with --reference)",
            )
        )
    if tref is not None and tref["found"] and "max_drift_ppm" in lim:
        d = float(tref["drift_ppm"])
        g.append(
            Gate(
                "clock_drift",
                abs(d) <= lim["max_drift_ppm"],
                d,
                lim["max_drift_ppm"],
                "ppm",
                f"the microphone's and the output's clocks differ by {d:.0f} ppm, more "
                f"than {lim['max_drift_ppm']:g} ppm: check the sample rate of both "
                "devices in the system's sound settings",
            )
        )
    rd = f["repeat_disagreement_db"]
    g.append(
        Gate(
            "repeats_agree",
            rd <= lim["max_repeat_disagreement_db"],
            rd if np.isfinite(rd) else -999.0,
            lim["max_repeat_disagreement_db"],
            "dB",
            f"repeats disagree ({rd:.1f} dB difference energy); keep the room quiet and "
            "still, or use a loopback channel if the latency varies",
        )
    )
    return g


def blocking(gates: list[Gate]) -> list[Gate]:
    """The gates that failed and stop a run (warnings never do)."""
    return [gt for gt in gates if not gt.passed and gt.severity != "warning"]


def warnings_of(gates: list[Gate] | list[dict]) -> list[str]:
    """Messages of the warning gates that did not pass (gates or their stored dicts)."""
    out = []
    for gt in gates:
        d = gt if isinstance(gt, dict) else gt.to_dict()
        if d.get("severity") == "warning" and d.get("passed") is False:
            out.append(str(d.get("message", d.get("name"))))
    return out


def raise_on_failure(gates: list[Gate], where: str) -> None:
    """Raise :class:`QualityGateError` naming every failed gate (suggest ``--force``).

    Warning gates never stop a run; :func:`gate_lines` and the report show them.
    """
    bad = blocking(gates)
    if bad:
        text = "; ".join(gt.message for gt in bad)
        raise QualityGateError(f"{where}: {text} (use --force to keep it anyway)")
