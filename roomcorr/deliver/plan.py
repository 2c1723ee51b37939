"""The route plan of a design at one sample rate, read from its folder.

A design folder's ``manifest.json`` lists ``routes`` (input -> output, with a
mix gain) and, for several loudspeakers, ``outputs`` (delay, gain and polarity
per output, already inside the filters unless ``in_filters`` is false). For one
sample rate :func:`load_route_plan` turns them into a :class:`RoutePlan`::

    y_o = trim_o * delay_{d_o}( h_o * sum_i mix[o, i] x_i )

Rendering (:mod:`roomcorr.playback.render`), the printed ffmpeg and sox
commands (:mod:`roomcorr.deliver.commands`) and the PipeWire configuration
(:mod:`roomcorr.deliver.pipewire`) all read the routes through this one function.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import soundfile as sf

from roomcorr.deliver.atomic import PathEscapeError, contained, sha256_of
from roomcorr.deliver.export import read_manifest
from roomcorr.errors import OutputError, SettingsError


@dataclass(frozen=True)
class RoutePlan:
    """Everything needed to render through a design at one sample rate.

    Attributes
    ----------
    fs : int
    input_names, output_names : list of str
    mix : ndarray, shape (n_outputs, n_inputs)
        Linear gain of each route (0 where an input does not feed an output).
    filters : ndarray, shape (n_outputs, n_taps)
        The filter of each output as stored (32-bit WAV values, as float64).
    delay_samples : ndarray of int, shape (n_outputs,)
        Delay applied after the filter (trims not inside the filters; else 0).
    trim : ndarray, shape (n_outputs,)
        Linear gain times polarity applied after the filter (else 1).
    paths : list of str
        Filter file of each output, relative to the design folder.
    pre_gain_db : float
        The design's common pre-gain (already inside the filters).
    latency_samples : int
        Latency of a mixed-phase design at ``fs`` (0 for minimum phase).
    """

    fs: int
    input_names: list[str]
    output_names: list[str]
    mix: np.ndarray
    filters: np.ndarray
    delay_samples: np.ndarray
    trim: np.ndarray
    paths: list[str]
    pre_gain_db: float
    latency_samples: int

    @property
    def n_inputs(self) -> int:
        return self.mix.shape[1]

    @property
    def n_outputs(self) -> int:
        return self.mix.shape[0]

    def combined_filters(self) -> np.ndarray:
        """Each output's filter with its trim delay and gain folded in, (n_outputs, n_total)."""
        n = self.filters.shape[1] + int(self.delay_samples.max(initial=0))
        h = np.zeros((self.n_outputs, n))
        for o in range(self.n_outputs):
            d = int(self.delay_samples[o])
            h[o, d : d + self.filters.shape[1]] = self.trim[o] * self.filters[o]
        return h


def design_rates(manifest: dict[str, Any]) -> list[int]:
    """Sample rates a design has routes (filters) for."""
    return sorted({int(r["sample_rate"]) for r in _routes_of(manifest)})


def _routes_of(manifest: dict[str, Any]) -> list[dict[str, Any]]:
    routes = manifest.get("routes")
    if isinstance(routes, list) and routes:
        return routes
    # a design written before routes were recorded: every channel feeds its own output
    return [
        {
            "input": e["channel"],
            "input_name": e["channel_name"],
            "output": e["channel"],
            "output_name": e["channel_name"],
            "sample_rate": e["sample_rate"],
            "path": e["path"],
            "gain_db": 0.0,
        }
        for e in manifest["files"]
        if e.get("kind") == "fir" and "format" not in e and "channel" in e
    ]


def _number(v: Any, what: str, lo: float, hi: float) -> float:
    if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v):
        raise OutputError(f"manifest.json: {what} is not a finite number; design again")
    if not lo <= v <= hi:
        raise OutputError(f"manifest.json: {what} = {v} is out of range; design again")
    return float(v)


def load_route_plan(design_dir: str | Path, fs: int) -> RoutePlan:
    """Read the routes, trims and filters of a design folder for rate ``fs``.

    Raises
    ------
    SettingsError
        If the design has no filters at ``fs`` (the message lists the rates it has).
    OutputError
        If the folder is not a design, a route names a file outside it, or a
        filter file changed since it was written (SHA-256 differs).
    """
    out = Path(design_dir)
    manifest = read_manifest(out)
    rates = design_rates(manifest)
    routes = [r for r in _routes_of(manifest) if int(r.get("sample_rate", -1)) == fs]
    if not routes:
        have = ", ".join(str(r) for r in rates) or "none"
        raise SettingsError(
            f"{out}: the design has no filters for {fs} Hz (it has {have} Hz); resample the "
            f"file or design again with --rates including {fs}"
        )
    n_in = 1 + max(int(r["input"]) for r in routes)
    n_out = 1 + max(int(r["output"]) for r in routes)
    if n_in > 64 or n_out > 64:
        raise OutputError(f"{out}/manifest.json: more than 64 routes' channels; design again")
    in_names = [""] * n_in
    out_names = [""] * n_out
    paths = [""] * n_out
    mix = np.zeros((n_out, n_in))
    for r in routes:
        i, o = int(r["input"]), int(r["output"])
        gain_db = _number(r.get("gain_db", 0.0), "a route's gain_db", -120.0, 24.0)
        mix[o, i] += 10.0 ** (gain_db / 20.0)
        in_names[i], out_names[o] = str(r["input_name"]), str(r["output_name"])
        if paths[o] and paths[o] != r["path"]:
            raise OutputError(f"{out}/manifest.json: output {o} has two filter files; design again")
        paths[o] = str(r["path"])
    if any(not p for p in paths):
        raise OutputError(f"{out}/manifest.json: an output has no route; design again")
    digests = {e["path"]: e.get("sha256") for e in manifest["files"]}
    filters = []
    for rel in paths:
        try:
            p = contained(out, rel)
        except PathEscapeError as exc:
            raise OutputError(f"{out}/manifest.json: a route names {exc}") from None
        if not p.is_file():
            raise OutputError(f"{p}: missing; the design folder is incomplete (design again)")
        if digests.get(rel) and sha256_of(p) != digests[rel]:
            raise OutputError(f"{p}: changed since it was written (SHA-256 differs); design again")
        h, fs_h = sf.read(str(p), dtype="float64", always_2d=False)
        if fs_h != fs or h.ndim != 1 or not np.all(np.isfinite(h)):
            raise OutputError(f"{p}: not a one-channel filter at {fs} Hz; design again")
        filters.append(h)
    n_taps = max(h.size for h in filters)
    fir = np.zeros((n_out, n_taps))
    for o, h in enumerate(filters):
        fir[o, : h.size] = h
    delay = np.zeros(n_out, dtype=int)
    trim = np.ones(n_out)
    for o_doc in manifest.get("outputs") or []:
        if o_doc.get("in_filters", True):
            continue
        o = int(o_doc["output"])
        if o >= n_out:
            continue
        d = o_doc.get("delay_samples", {}).get(str(fs), 0)
        delay[o] = int(_number(d, "an output's delay_samples", 0, 10 * fs))
        g = _number(o_doc.get("gain_db", 0.0), "an output's gain_db", -60.0, 24.0)
        pol = -1.0 if o_doc.get("polarity", 1) < 0 else 1.0
        trim[o] = pol * 10.0 ** (g / 20.0)
    latency = manifest.get("latency") or {}
    lat = (latency.get("samples") or {}).get(str(fs), 0)
    return RoutePlan(
        fs=fs,
        input_names=in_names,
        output_names=out_names,
        mix=mix,
        filters=fir,
        delay_samples=delay,
        trim=trim,
        paths=paths,
        pre_gain_db=float(manifest.get("pre_gain_db", 0.0)),
        latency_samples=int(_number(lat, "latency samples", 0, 10 * fs)),
    )
