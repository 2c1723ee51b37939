"""The report's figures, drawn with matplotlib's non-interactive Agg canvas.

Each ``plot_*`` function takes plain arrays and returns a
:class:`matplotlib.figure.Figure`; :func:`png_bytes` turns one into PNG bytes.
Figures are made with :class:`~matplotlib.figure.Figure` and an Agg canvas
directly (no pyplot), so no GUI backend is ever touched and figures do not
accumulate in a global registry. matplotlib is imported inside the functions,
so importing this module is cheap.
"""

from __future__ import annotations

import io
from typing import Any

import numpy as np
from matplotlib import colormaps
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import LinearSegmentedColormap
from matplotlib.figure import Figure

from roomcorr.analysis.average import power_average

# Our own palette.
INK = "#24313f"
SEAT = "#9bb0c4"
MEAN = "#155e6b"
AIM = "#c8553d"
CAP = "#b8892b"
AFTER = "#2f8f5b"
REFUSED = "#f3d7cf"
OUTSIDE = "#eceff3"

#: Width of a per-channel figure, inches: two channels sit side by side on a laptop screen
#: at about their natural size (630 px each at the report's 90 dpi).
COLUMN_WIDTH_IN = 7.0
#: Legend text size, points (12.5 px at 90 dpi; about 11 px when a column is scaled to
#: 560 px). Every legend and small label uses it.
LEGEND_PT = 10.0
#: Level axes: never more than this many dB below the top (a deep notch is shown down
#: to there, not clipped at a fixed span) ...
MAX_LEVEL_SPAN_DB = 90.0
#: ... gain axes of the filter between these, dB ...
GAIN_AXIS_DB = (-60.0, 25.0)
#: ... and group delay axes between these, ms.
GROUP_DELAY_AXIS_MS = (-250.0, 1000.0)

FREQ_TICKS = [20, 50, 100, 200, 500, 1000, 2000, 5000, 10000, 20000]
FREQ_LABELS = ["20", "50", "100", "200", "500", "1k", "2k", "5k", "10k", "20k"]


def new_figure(
    width_in: float = COLUMN_WIDTH_IN, height_in: float = 4.4, **margins: float
) -> Any:
    """An empty figure on an Agg canvas (no pyplot, no GUI).

    Margins are fixed (``subplots_adjust`` keywords, in figure fractions)
    rather than computed by a layout engine: that saves a full extra drawing
    pass per figure (about a quarter of the time, see benchmarks/bench_report.py).
    """

    fig = Figure(figsize=(width_in, height_in))
    FigureCanvasAgg(fig)
    pad = {"left": 0.5 / width_in + 0.04, "right": 0.98, "bottom": 0.5 / height_in + 0.04,
           "top": 1 - 0.35 / height_in, "hspace": 0.25, "wspace": 0.25}
    pad.update(margins)
    fig.subplots_adjust(**pad)
    return fig


def png_bytes(fig: Any, dpi: int = 90) -> bytes:
    """Render a figure to PNG bytes."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, facecolor="white")
    return buf.getvalue()


def _freq_axis(ax: Any, f_lo: float = 20.0, f_hi: float = 20000.0, sparse: bool = False) -> None:
    ax.set_xscale("log")
    ax.set_xlim(f_lo, f_hi)
    ticks = [t for t in FREQ_TICKS if f_lo <= t <= f_hi]
    if sparse:
        ticks = [t for t in ticks if t in (20, 100, 1000, 10000)]
    ax.set_xticks(ticks, [FREQ_LABELS[FREQ_TICKS.index(t)] for t in ticks])
    ax.minorticks_off()
    ax.set_xlabel("frequency (Hz)")
    ax.grid(True, which="major", color="#dde3ea", linewidth=0.7)


def _shade_outside(ax: Any, band_hz: tuple[float, float]) -> None:
    ax.axvspan(1.0, band_hz[0], color=OUTSIDE, zorder=0, lw=0)
    ax.axvspan(band_hz[1], 1e6, color=OUTSIDE, zorder=0, lw=0)


def _level_limits(ax: Any, *curves: np.ndarray, freq_hz: np.ndarray) -> None:
    """Level axis from the data between 20 Hz and 20 kHz: the deepest dip stays visible.

    Top 4 dB above the highest value; bottom 4 dB below the lowest, but never
    more than :data:`MAX_LEVEL_SPAN_DB` below the top.
    """
    m = (freq_hz >= 20) & (freq_hz <= 20000)
    vals = np.concatenate([np.ravel(np.asarray(c)[..., m]) for c in curves])
    vals = vals[np.isfinite(vals)]
    if vals.size == 0:
        return
    top = float(np.max(vals)) + 4
    ax.set_ylim(max(float(np.min(vals)) - 4, top - MAX_LEVEL_SPAN_DB), top)


def _legend_below(ax: Any) -> None:
    """Legend in two columns under the axes, clear of the curves."""
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.16), ncols=2, fontsize=LEGEND_PT,
              frameon=False)


def data_limits(
    values: np.ndarray, caps: tuple[float, float], margin: float, at_least: tuple[float, float]
) -> tuple[float, float]:
    """Axis limits that hold every finite value (plus ``margin``), within ``caps``.

    ``at_least`` is a range always shown (so a flat curve still gets an axis).

    Returns
    -------
    (lo, hi)
    """
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    lo, hi = at_least
    if v.size:
        span = float(np.max(v) - np.min(v))
        pad = max(margin, 0.05 * span)
        lo, hi = min(lo, float(np.min(v)) - pad), max(hi, float(np.max(v)) + pad)
    return max(lo, caps[0]), min(hi, caps[1])


def plot_responses(
    freq_hz: np.ndarray,
    measured_db: np.ndarray,
    average_db: np.ndarray,
    target_db: np.ndarray | None,
    band_hz: tuple[float, float] | None,
    max_boost_db: float | None,
    title: str,
) -> Any:
    """Every position (thin), the average (thick), target, band and boost cap.

    Parameters
    ----------
    freq_hz : ndarray, shape (n_freqs,)
    measured_db : ndarray, shape (n_positions, n_freqs)
    average_db : ndarray, shape (n_freqs,)
    target_db : ndarray, shape (n_freqs,), optional
    band_hz : (lo, hi), optional
    max_boost_db : float, optional
        Draws ``target - max_boost_db``: a dip reaching below it cannot be filled.
    title : str
    """
    fig = new_figure(COLUMN_WIDTH_IN, 5.0, bottom=0.26)
    ax = fig.add_subplot()
    if band_hz is not None:
        _shade_outside(ax, band_hz)
    for k, row in enumerate(measured_db):
        ax.plot(freq_hz, row, color=SEAT, lw=0.7, label="each position" if k == 0 else None)
    ax.plot(freq_hz, average_db, color=MEAN, lw=2.4, label="average of positions")
    if target_db is not None:
        ax.plot(freq_hz, target_db, color=AIM, lw=1.8, ls="--", label="target")
        if max_boost_db is not None:
            ax.plot(
                freq_hz,
                target_db - max_boost_db,
                color=CAP,
                lw=1.2,
                ls=":",
                label=f"boost cap (target - {max_boost_db:g} dB)",
            )
    _freq_axis(ax)
    _level_limits(ax, measured_db, average_db, freq_hz=freq_hz)
    ax.set_ylabel("level (dB)")
    ax.set_title(title, loc="left", color=INK)
    _legend_below(ax)
    return fig


def plot_predicted(
    freq_hz: np.ndarray,
    predicted_db: np.ndarray,
    before_db: np.ndarray,
    target_db: np.ndarray,
    band_hz: tuple[float, float],
    title: str,
    pre_gain_db: float = 0.0,
) -> Any:
    """Predicted result at every position against the target.

    Parameters
    ----------
    predicted_db : ndarray, shape (n_positions, n_freqs)
        Each measurement convolved with its filter and analysed like the measurement.
    before_db : ndarray, shape (n_freqs,)
        Average before correction, for comparison.
    target_db : ndarray, shape (n_freqs,)
        Target as the filtered result should meet it (pre-gain included).
    pre_gain_db : float
        Only for the legend.
    """
    fig = new_figure(COLUMN_WIDTH_IN, 5.0, bottom=0.26)
    ax = fig.add_subplot()
    _shade_outside(ax, band_hz)
    ax.plot(freq_hz, before_db, color="#b9c2cc", lw=1.6, label="average before")
    for k, row in enumerate(predicted_db):
        ax.plot(freq_hz, row, color=AFTER, lw=0.8, alpha=0.8,
                label="each position, corrected" if k == 0 else None)

    after = power_average(np.asarray(predicted_db))[0]
    ax.plot(freq_hz, after, color="#1d5e3a", lw=2.4, label="average, corrected")
    label = f"target {pre_gain_db:+.1f} dB pre-gain" if abs(pre_gain_db) >= 0.05 else "target"
    ax.plot(freq_hz, target_db, color=AIM, lw=1.8, ls="--", label=label)
    _freq_axis(ax)
    _level_limits(ax, predicted_db, before_db, freq_hz=freq_hz)
    ax.set_ylabel("level (dB)")
    ax.set_title(title, loc="left", color=INK)
    _legend_below(ax)
    return fig


def plot_filter(
    freq_hz: np.ndarray,
    gain_db: np.ndarray,
    phase_deg: np.ndarray,
    group_delay_ms: np.ndarray,
    correction_db: np.ndarray,
    withheld_db: np.ndarray,
    band_hz: tuple[float, float],
    pre_gain_db: float,
    fs: int,
    title: str,
) -> Any:
    """Magnitude, phase and group delay of one filter; refused boost shaded.

    Parameters
    ----------
    gain_db, phase_deg, group_delay_ms : ndarray, shape (n_freqs,)
        Response of the exported FIR (pre-gain included) on ``freq_hz``.
    correction_db, withheld_db : ndarray, shape (n_freqs,)
        Designed correction curve (before pre-gain) and the boost refused.
    """
    fig = new_figure(COLUMN_WIDTH_IN, 7.6, hspace=0.12, bottom=0.08)
    ax1, ax2, ax3 = fig.subplots(3, 1, sharex=True, height_ratios=[2.2, 1, 1])
    for ax in (ax1, ax2, ax3):
        _shade_outside(ax, band_hz)
    refused = np.asarray(withheld_db) > 1.0
    m = np.concatenate([[False], refused, [False]]).astype(int)
    d = np.diff(m)
    for k, (a, b) in enumerate(zip(np.nonzero(d == 1)[0], np.nonzero(d == -1)[0], strict=True)):
        for ax in (ax1, ax2, ax3):
            ax.axvspan(freq_hz[a], freq_hz[b - 1], color=REFUSED, zorder=0.5, lw=0,
                       label="boost refused" if (k == 0 and ax is ax1) else None)
    ax1.plot(freq_hz, correction_db + pre_gain_db, color=AIM, lw=1.4, ls="--",
             label="designed curve + pre-gain")
    ax1.plot(freq_hz, correction_db + withheld_db + pre_gain_db, color=CAP, lw=1.0, ls=":",
             label="what full correction would need")
    ax1.plot(freq_hz, gain_db, color=MEAN, lw=2.0, label=f"filter at {fs} Hz")
    ax1.axhline(0.0, color=INK, lw=0.8)
    ax1.set_ylabel("gain (dB)")
    audible = (freq_hz >= 20) & (freq_hz <= 20000)
    shown = np.r_[gain_db[audible], (correction_db + pre_gain_db)[audible],
                  (correction_db + withheld_db + pre_gain_db)[audible]]
    ax1.set_ylim(*data_limits(shown, GAIN_AXIS_DB, 2.0, (-3.0, 3.0)))
    ax1.legend(loc="lower left", fontsize=LEGEND_PT, frameon=False, ncols=2)
    ax1.set_title(title, loc="left", color=INK)
    ax2.plot(freq_hz, phase_deg, color=MEAN, lw=1.4)
    ax2.set_ylabel("phase (deg)")
    ax2.set_ylim(-190, 190)
    ax2.set_yticks([-180, -90, 0, 90, 180])
    ax3.plot(freq_hz, group_delay_ms, color=MEAN, lw=1.4)
    ax3.set_ylabel("group delay (ms)")
    ax3.set_ylim(*data_limits(group_delay_ms[audible], GROUP_DELAY_AXIS_MS, 1.0, (-1.0, 2.0)))
    for ax in (ax1, ax2, ax3):
        _freq_axis(ax)
    ax1.set_xlabel("")
    ax2.set_xlabel("")
    return fig


def plot_time(
    fs: int,
    fir: np.ndarray,
    before: np.ndarray,
    after: np.ndarray,
    title: str,
    span_ms: tuple[float, float] = (-5.0, 40.0),
) -> Any:
    """Impulse and step response of the filter and of the corrected system.

    Parameters
    ----------
    fir : ndarray, shape (n_taps,)
    before, after : ndarray, shape (n,)
        One position's impulse response as measured and with the filter applied
        (same length and time origin).
    span_ms : (float, float)
        Shown time span relative to each response's main peak; negative time
        shows any pre-ringing.
    """
    fig = new_figure(COLUMN_WIDTH_IN, 5.8, top=0.9, hspace=0.5, wspace=0.3, bottom=0.1,
                     left=0.11)
    axs = fig.subplots(2, 2)

    def _span(x: np.ndarray, ref: int) -> tuple[np.ndarray, np.ndarray]:
        t_ms = (np.arange(len(x)) - ref) / fs * 1000.0
        sel = (t_ms >= span_ms[0]) & (t_ms <= span_ms[1])
        return t_ms[sel], x[sel]

    ref_f = int(np.argmax(np.abs(fir)))
    t, x = _span(np.concatenate([np.zeros(int(-span_ms[0] * fs / 1000) + 1), fir]),
                 ref_f + int(-span_ms[0] * fs / 1000) + 1)
    axs[0, 0].plot(t, x, color=MEAN, lw=1.1)
    axs[0, 1].plot(t, np.cumsum(x), color=MEAN, lw=1.1)  # step: running sum of the taps
    ref = int(np.argmax(np.abs(before)))
    tb, xb = _span(before, ref)
    ta, xa = _span(after, ref)
    scale = float(np.max(np.abs(xb))) or 1.0
    step_scale = float(np.max(np.abs(np.cumsum(xb)))) or 1.0
    axs[1, 0].plot(tb, xb / scale, color=SEAT, lw=1.1, label="as measured")
    axs[1, 0].plot(ta, xa / scale, color=AFTER, lw=1.1, label="corrected")
    axs[1, 1].plot(tb, np.cumsum(xb) / step_scale, color=SEAT, lw=1.1, label="as measured")
    axs[1, 1].plot(ta, np.cumsum(xa) / step_scale, color=AFTER, lw=1.1, label="corrected")
    names = [["filter: impulse", "filter: step"], ["room: impulse", "room: step"]]
    for i in range(2):
        for j in range(2):
            ax = axs[i, j]
            ax.set_title(names[i][j], loc="left", fontsize=10, color=INK)
            ax.axvline(0.0, color="#c9d1da", lw=0.8)
            ax.axhline(0.0, color="#c9d1da", lw=0.8)
            ax.set_xlabel("time from main peak (ms)")
            ax.grid(True, color="#eef1f4")
    axs[1, 0].legend(fontsize=LEGEND_PT, frameon=False)
    axs[0, 0].set_ylabel("amplitude")
    axs[1, 0].set_ylabel("amplitude (relative)")
    fig.suptitle(title, x=0.01, ha="left", color=INK)
    return fig


def plot_decay(bands: list[Any], title: str) -> Any:
    """Schroeder curves per octave band and EDT/T20/T30 bars.

    Parameters
    ----------
    bands : list of :class:`roomcorr.analysis.decay.BandDecay`
    """

    fig = new_figure(COLUMN_WIDTH_IN, 4.8, top=0.9, wspace=0.3, bottom=0.13)
    ax1, ax2 = fig.subplots(1, 2, width_ratios=[1.2, 1])
    cmap = colormaps["viridis"]
    for k, b in enumerate(bands):
        c = b.curve
        sel = np.isfinite(c.edc_db) & (c.edc_db > -70)
        step = max(1, int(sel.sum() // 2000))
        ax1.plot(c.time_s[sel][::step], c.edc_db[sel][::step],
                 color=cmap(k / max(1, len(bands) - 1)), lw=1.2, label=b.label)
    for lvl in (-5, -25, -35):
        ax1.axhline(lvl, color="#c9d1da", lw=0.8, ls="--")
    ax1.set_ylim(-70, 2)
    ax1.set_xlabel("time (s)")
    ax1.set_ylabel("decay (dB)")
    ax1.legend(title="band (Hz)", fontsize=LEGEND_PT, title_fontsize=LEGEND_PT, ncols=2,
               frameon=False)
    ax1.grid(True, color="#eef1f4")
    x = np.arange(len(bands))
    w = 0.27
    for off, key, col, lab in ((-w, "edt_s", SEAT, "EDT"), (0, "t20_s", MEAN, "T20"),
                               (w, "t30_s", AIM, "T30")):
        vals = np.array([getattr(b, key) for b in bands], dtype=float)
        ax2.bar(x + off, np.nan_to_num(vals), width=w, color=col, label=lab)
    ax2.set_xticks(x, [b.label for b in bands])
    ax2.tick_params(axis="x", labelrotation=45)
    ax2.set_xlabel("octave band (Hz)")
    ax2.set_ylabel("decay time (s)")
    ax2.legend(fontsize=LEGEND_PT, frameon=False)
    ax2.grid(True, axis="y", color="#eef1f4")
    fig.suptitle(title, x=0.01, ha="left", color=INK)
    return fig


#: The decay maps' colour scale, shared by the report and the browser app (which gets it with
#: the decay view): level in dB re the first slice's loudest bin -> RGB, linear between stops.
DECAY_MAP_FLOOR_DB = -45.0
DECAY_MAP_STOPS: list[tuple[float, tuple[int, int, int]]] = [
    (-45.0, (24, 33, 45)),
    (-32.0, (35, 72, 104)),
    (-20.0, (31, 122, 116)),
    (-10.0, (196, 168, 92)),
    (0.0, (252, 246, 226)),
]


def decay_map_colormap() -> Any:
    """:data:`DECAY_MAP_STOPS` as a matplotlib colormap over ``DECAY_MAP_FLOOR_DB .. 0`` dB."""

    lo = DECAY_MAP_FLOOR_DB
    return LinearSegmentedColormap.from_list(
        "roomcorr-decay",
        [((db - lo) / -lo, tuple(c / 255 for c in rgb)) for db, rgb in DECAY_MAP_STOPS],
        N=int(round(-lo * 10)) + 1,  # one entry per 0.1 dB, as the app's look-up table
    )


def plot_decay_map(
    maps: list[tuple[str, Any]],
    modes: list[tuple[float, float]],
    title: str,
    floor_db: float = DECAY_MAP_FLOOR_DB,
) -> Any:
    """Low-frequency decay maps side by side (e.g. as measured and corrected).

    Time runs upwards, frequency (log) to the right, colour is level; a ridge
    that climbs high is a mode that keeps ringing. The longest-ringing peaks are
    marked with their equivalent 60 dB decay time.

    Parameters
    ----------
    maps : list of (label, :class:`roomcorr.analysis.decay.DecayMap`)
    modes : list of (freq_hz, decay_s)
        Marked on the first map.
    """
    fig = new_figure(COLUMN_WIDTH_IN, 4.6, top=0.88, right=1.0, wspace=0.06)
    axs = fig.subplots(1, len(maps), sharey=True, squeeze=False)[0]
    im = None
    for ax, (label, m) in zip(axs, maps, strict=True):
        im = ax.pcolormesh(m.freq_hz, m.time_s * 1000, np.clip(m.level_db, floor_db, 0),
                           shading="nearest", cmap=decay_map_colormap(), vmin=floor_db, vmax=0,
                           rasterized=True)
        ax.set_xscale("log")
        ticks = [t for t in (20, 30, 50, 100, 200, 300)
                 if m.freq_hz[0] <= t <= m.freq_hz[-1]]
        ax.set_xticks(ticks, [str(t) for t in ticks])
        ax.minorticks_off()
        ax.set_xlabel("frequency (Hz)")
        ax.set_title(label, loc="left", fontsize=10, color=INK)
    for k, (f0, t0) in enumerate(modes):
        axs[0].annotate(f"{f0:.0f} Hz\n{t0:.2f} s", xy=(f0, 15), xytext=(f0, 330 + 90 * k),
                        color="white", fontsize=LEGEND_PT, ha="center",
                        arrowprops={"arrowstyle": "-", "color": "white", "lw": 0.8})
    axs[0].set_ylabel("time after direct sound (ms)")
    if im is not None:
        fig.colorbar(im, ax=list(axs), label="level (dB re first slice peak)", shrink=0.9)
    fig.suptitle(title, x=0.01, ha="left", color=INK)
    return fig


def plot_quality(recordings: list[dict[str, Any]], title: str) -> Any:
    """Measurement quality: SNR per octave band, harmonic distortion, repeat agreement.

    Parameters
    ----------
    recordings : list of dict
        One per recording (position and loudspeaker), as made by
        :func:`roomcorr.report.html.quality_from_record`: ``label``, ``snr_db``
        ({band centre: dB}), ``hd_freq_hz`` (list), ``hd_db`` ({order: list of dB}),
        ``repeat_db`` (float or None).
    """

    fig = new_figure(9.0, 3.8, top=0.85, wspace=0.45, left=0.08, bottom=0.2)
    ax1, ax2, ax3 = fig.subplots(1, 3, width_ratios=[1, 1.3, 0.8])
    cmap = colormaps["tab10"]
    for k, r in enumerate(recordings):
        col = cmap(k % 10)
        snr = r.get("snr_db") or {}
        if snr:
            f = np.array([float(x) for x in snr])
            v = np.array([np.nan if snr[x] is None else float(snr[x]) for x in snr])
            o = np.argsort(f)
            ax1.plot(f[o], v[o], marker="o", ms=3, lw=1, color=col, label=r["label"])
        hf = np.asarray(r.get("hd_freq_hz") or [], dtype=float)
        for order, vals in (r.get("hd_db") or {}).items():
            v = np.array([np.nan if x is None else float(x) for x in vals])
            if hf.size and v.size == hf.size:
                ax2.plot(hf, v, lw=1, marker=".", ms=3, color=col,
                         ls="-" if order == "2" else "--",
                         label=f"H{order}" if k == 0 else None)
    ax1.axhline(40, color=AIM, lw=1, ls=":")
    _freq_axis(ax1, 20, 20000, sparse=True)
    ax1.set_ylabel("signal-to-noise (dB)")
    ax1.set_title("signal to noise per octave", loc="left", fontsize=10)
    ax1.legend(fontsize=LEGEND_PT, frameon=False)
    _freq_axis(ax2, 20, 20000, sparse=True)
    ax2.set_ylabel("harmonic level\n(dB re fundamental)")
    ax2.set_title("harmonic distortion", loc="left", fontsize=10)
    if ax2.lines:
        ax2.legend(fontsize=LEGEND_PT, frameon=False)
    labels = [r["label"] for r in recordings]
    reps = [np.nan if r.get("repeat_db") is None else float(r["repeat_db"]) for r in recordings]
    ax3.barh(range(len(reps)), np.nan_to_num(reps, nan=0.0), color=MEAN)
    ax3.set_yticks(range(len(reps)), labels, fontsize=LEGEND_PT)
    ax3.set_xlabel("difference\n(dB re response)")
    ax3.set_title("repeat agreement", loc="left", fontsize=10)
    if all(np.isnan(reps)):
        ax3.text(0.5, 0.5, "single sweep:\nno repeats", ha="center", va="center",
                 transform=ax3.transAxes)
    fig.suptitle(title, x=0.01, ha="left", color=INK)
    return fig


def plot_iir(
    freq_hz: np.ndarray,
    cascades_db: dict[int, np.ndarray],
    fir_db: np.ndarray | None,
    designed_db: np.ndarray,
    band_hz: tuple[float, float],
    title: str,
) -> Any:
    """Biquad cascades (one per rate, pre-gain included) against the FIR and the designed curve.

    Parameters
    ----------
    cascades_db : dict
        Rate -> response in dB on ``freq_hz`` (NaN above Nyquist).
    fir_db : ndarray, optional
        The FIR's response for comparison.
    designed_db : ndarray
        Designed correction curve plus pre-gain.
    """

    fig = new_figure(COLUMN_WIDTH_IN, 5.0, bottom=0.26)
    ax = fig.add_subplot()
    _shade_outside(ax, band_hz)
    if fir_db is not None:
        ax.plot(freq_hz, fir_db, color=SEAT, lw=2.2, label="FIR")
    ax.plot(freq_hz, designed_db, color=AIM, lw=1.0, ls="--", label="designed curve + pre-gain")
    cmap = colormaps["viridis"]
    for k, (rate, db) in enumerate(sorted(cascades_db.items())):
        ax.plot(freq_hz, db, color=cmap(0.15 + 0.7 * k / max(1, len(cascades_db) - 1)), lw=1.2,
                label=f"biquads at {rate} Hz")
    ax.axhline(0.0, color=INK, lw=0.8)
    _freq_axis(ax)
    ax.set_ylabel("gain (dB)")
    ax.set_title(title, loc="left", color=INK)
    _legend_below(ax)
    return fig


def plot_mixed_phase(
    view: dict[str, np.ndarray], latency_ms: float, limit_db: float, limit_ms: float, title: str
) -> Any:
    """Direct sound before and after the minimum- and mixed-phase designs, and pre-ringing.

    Parameters
    ----------
    view : dict
        :func:`roomcorr.design.phase.mixedphase.direct_sound_views` of one channel:
        ``gd_freq_hz``, ``gd_s`` (3, n_f), ``step_t_s``, ``step`` (3, n_t),
        ``ring_t_s``, ``ring_db``; the three rows are as measured, minimum
        phase, mixed phase.
    latency_ms : float
        The latency (nothing may come earlier than this before the main peak).
    limit_db, limit_ms : float
        Energy more than ``limit_ms`` before the main peak stays below ``limit_db``.
    """
    fig = new_figure(9.0, 7.2, top=0.92, hspace=0.55, bottom=0.08)
    axs = fig.subplots(3, 1)
    colors = (SEAT, MEAN, AFTER)
    labels = ("as measured", "minimum phase", "mixed phase")
    f = view["gd_freq_hz"]
    for row, color, label in zip(view["gd_s"], colors, labels, strict=True):
        axs[0].plot(f, 1000 * row, color=color, lw=1.3, label=label)
    _freq_axis(axs[0], float(f[0]), float(f[-1]))
    axs[0].set_ylabel("group delay (ms)")
    axs[0].set_title(
        "direct sound: group delay (mean over positions, relative to 1-10 kHz)",
        loc="left",
        fontsize=10,
        color=INK,
    )
    axs[0].legend(fontsize=8, frameon=False)
    t_ms = 1000 * view["step_t_s"]
    for row, color, label in zip(view["step"], colors, labels, strict=True):
        axs[1].plot(t_ms, row, color=color, lw=1.2, label=label)
    axs[1].set_xlabel("time from main peak (ms)")
    axs[1].set_ylabel("step (relative)")
    axs[1].set_title(
        "direct sound: step response (first position)", loc="left", fontsize=10, color=INK
    )
    axs[2].plot(
        1000 * view["ring_t_s"],
        view["ring_db"],
        color=AFTER,
        lw=1.3,
        label="energy arriving earlier, share of the total",
    )
    axs[2].hlines(
        limit_db,
        -latency_ms,
        -limit_ms,
        color=AIM,
        lw=1.2,
        label=f"limit: {limit_db:g} dB beyond {limit_ms:g} ms",
    )
    axs[2].axvline(-latency_ms, color=CAP, lw=1.0, ls="--", label=f"latency {latency_ms:g} ms")
    axs[2].set_xlim(-latency_ms * 1.1, 0.5)
    axs[2].set_ylim(-100, 3)
    axs[2].set_xlabel("time from the filter's main peak (ms)")
    axs[2].set_ylabel("dB")
    axs[2].set_title("mixed-phase filter: pre-ringing", loc="left", fontsize=10, color=INK)
    axs[2].legend(fontsize=8, frameon=False, loc="upper left")
    for ax in axs:
        ax.grid(True, color="#eef1f4")
    fig.suptitle(title, x=0.01, ha="left", color=INK)
    return fig


def plot_through(
    freq_hz: np.ndarray,
    measured_db: np.ndarray,
    predicted_db: np.ndarray,
    positions: list[Any],
    title: str,
) -> Any:
    """Measured through the filters (solid) against the design's prediction (dashed).

    Parameters
    ----------
    freq_hz : ndarray, shape (n_freqs,)
    measured_db, predicted_db : ndarray, shape (n_positions, n_freqs)
    positions : list
        Position labels, one per row.
    title : str
    """
    fig = new_figure(height_in=4.4)
    ax = fig.subplots()
    palette = (MEAN, AIM, AFTER, SEAT, INK)
    for i, (m, p) in enumerate(zip(measured_db, predicted_db, strict=True)):
        color = palette[i % len(palette)]
        ax.semilogx(freq_hz, m, color=color, lw=1.4, label=f"position {positions[i]}, measured")
        ax.semilogx(freq_hz, p, color=color, lw=1.1, ls="--", label="predicted")
    _freq_axis(ax, float(freq_hz[0]), float(freq_hz[-1]))
    ax.set_ylabel("level (dB)")
    ax.set_title(title, loc="left", fontsize=11, color=INK)
    ax.legend(fontsize=LEGEND_PT, frameon=False, ncol=2, loc="upper center",
              bbox_to_anchor=(0.5, -0.16))
    return fig


def plan_figure(plan: dict[str, Any]) -> Any:
    """Plan view of the room: current and suggested positions over a map of the bass.

    ``plan`` is the ``plan`` of :func:`roomcorr.app.placement.advise_command`:
    ``size_m``, ``current`` and ``suggested`` (``speakers_m`` name -> [x, y, z],
    ``seat_m``), and ``map`` (``x_m``, ``y_m``, ``ripple_db``: predicted bass
    unevenness at seat height with the suggested loudspeakers). The front wall is at
    the top, as a listener facing the loudspeakers sees the room on paper.
    """
    w, length = float(plan["size_m"][0]), float(plan["size_m"][1])
    height_in = min(8.0, 1.0 + 5.0 * length / w)
    fig = new_figure(6.0, height_in, left=0.12, right=0.86, bottom=0.08, top=0.93)
    ax = fig.add_subplot(1, 1, 1)
    m = plan.get("map")
    if m:
        img = ax.pcolormesh(m["x_m"], m["y_m"], np.asarray(m["ripple_db"]), shading="nearest",
                            cmap="Blues_r", alpha=0.8)
        cb = fig.colorbar(img, ax=ax, fraction=0.05, pad=0.02)
        cb.set_label("bass unevenness 30-250 Hz, dB (lower is smoother)")
    ax.plot([0, w, w, 0, 0], [0, 0, length, length, 0], color=INK, lw=1.5)
    for key, style, label in (("current", {"mfc": "white", "mec": INK}, "now"),
                              ("suggested", {"mfc": AFTER, "mec": AFTER}, "suggested")):
        pos = plan.get(key)
        if not pos:
            continue
        spk = np.asarray(list(pos["speakers_m"].values()), dtype=float)
        ax.plot(spk[:, 0], spk[:, 1], "s", ms=9, label=f"loudspeakers ({label})", **style)
        ax.plot([pos["seat_m"][0]], [pos["seat_m"][1]], "o", ms=10, label=f"seat ({label})",
                **style)
    ax.set_xlim(-0.1, w + 0.1)
    ax.set_ylim(length + 0.1, -0.1)  # front wall at the top
    ax.set_aspect("equal")
    ax.set_xlabel("x, m (from the left wall)")
    ax.set_ylabel("y, m (from the front wall)")
    ax.set_title("Plan: where things are and where to move them", fontsize=10)
    ax.legend(loc="lower right", fontsize=8, framealpha=0.9)
    return fig
