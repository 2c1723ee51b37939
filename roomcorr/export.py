"""Writers for a design: FIR WAVs, ``design.npz`` curves and ``manifest.json``.

Layout of a design output folder::

    DIR/manifest.json           every file written, with its safety figures and SHA-256
    DIR/design.npz              the curves (for reports and comparisons)
    DIR/fir/48000/left.wav      one 32-bit float WAV per channel and sample rate

Every file goes through :mod:`roomcorr.atomic`. All filters are computed
before the first file is written; if writing fails part-way, the files this
run added are removed again, so nothing half-written is left behind. A
folder that already holds a design is never overwritten silently.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from roomcorr.atomic import atomic_write_text, atomic_write_with
from roomcorr.audio_io import write_wav
from roomcorr.design.mixedphase import from_arrays as mixed_phase_from_arrays
from roomcorr.design.mixedphase import latency_record
from roomcorr.design.mixedphase import to_arrays as mixed_phase_arrays
from roomcorr.errors import OutputError
from roomcorr.settings import settings_to_dict

if TYPE_CHECKING:
    from roomcorr.pipeline import DesignResult

MANIFEST = "manifest.json"
CURVES = "design.npz"
FORMAT_VERSION = 1


def sha256_of(path: Path) -> str:
    """SHA-256 hex digest of a file."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def read_manifest(out_dir: str | Path) -> dict[str, Any]:
    """Read ``manifest.json`` of a design folder."""
    p = Path(out_dir) / MANIFEST
    try:
        return json.loads(p.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise OutputError(f"{p}: no manifest; is {out_dir} a design folder?") from None
    except json.JSONDecodeError as exc:
        raise OutputError(f"{p}: damaged manifest ({exc})") from None


def write_manifest(out_dir: str | Path, manifest: dict[str, Any]) -> Path:
    """Write ``manifest.json`` atomically."""
    return atomic_write_text(Path(out_dir) / MANIFEST, json.dumps(manifest, indent=2) + "\n")


def add_manifest_entries(out_dir: str | Path, entries: list[dict[str, Any]]) -> None:
    """Append file entries (with their SHA-256 filled in) to a folder's manifest."""
    manifest = read_manifest(out_dir)
    for e in entries:
        e = dict(e)
        e.setdefault("sha256", sha256_of(Path(out_dir) / e["path"]))
        manifest["files"].append(e)
    write_manifest(out_dir, manifest)


def _check_out_dir(out: Path, replace: bool) -> None:
    if out.exists() and not out.is_dir():
        raise OutputError(f"--out {out}: exists and is not a folder")
    if out.is_dir() and not replace:
        earlier = (out / MANIFEST).exists() or any(out.glob("fir/*/*.wav"))
        if earlier:
            raise OutputError(
                f"--out {out}: already holds a design; choose another folder or pass "
                "--replace to write over it"
            )


def _curves_dict(result: DesignResult) -> dict[str, np.ndarray]:
    data: dict[str, np.ndarray] = {
        "freq_hz": result.freq_hz,
        "fs_in": np.array(result.fs_in),
        "pre_gain_db": np.array(result.pre_gain_db),
        "irs": result.irs.astype(np.float32),
        "channel_names": np.array([c.name for c in result.channels]),
    }
    for c in result.channels:
        for key in (
            "arrival_s",
            "measured_db",
            "average_db",
            "spread_db",
            "target_db",
            "raw_correction_db",
            "correction_db",
            "boost_withheld_db",
        ):
            data[f"ch{c.index}_{key}"] = getattr(c, key)
        data[f"ch{c.index}_band_hz"] = np.array(c.band_hz)
    for fs, h in result.firs.items():
        data[f"fir_{fs}"] = h
    if getattr(result, "mixed_phase", None) is not None:
        data.update(mixed_phase_arrays(result.mixed_phase))
    return data


def load_design_curves(out_dir: str | Path) -> dict[str, Any]:
    """Load ``design.npz`` of a design folder into a dict.

    Returns a mapping with ``freq_hz``, ``fs_in``, ``pre_gain_db``, ``irs``
    (n_positions, n_channels, n_samples), ``firs`` (rate -> (n_channels,
    n_taps)) and ``channels``: a list of dicts with the keys of
    :class:`roomcorr.pipeline.ChannelDesign`.
    """
    p = Path(out_dir) / CURVES
    if not p.is_file():
        raise OutputError(f"{p}: missing; is {out_dir} a design folder?")
    with np.load(p, allow_pickle=False) as z:
        raw = {k: z[k] for k in z.files}
    names = [str(n) for n in raw["channel_names"]]
    channels = []
    for i, name in enumerate(names):
        ch: dict[str, Any] = {"index": i, "name": name}
        for k, v in raw.items():
            if k.startswith(f"ch{i}_"):
                ch[k[len(f"ch{i}_") :]] = v
        ch["band_hz"] = tuple(float(x) for x in ch["band_hz"])
        channels.append(ch)
    firs = {int(k[4:]): v for k, v in raw.items() if k.startswith("fir_")}
    return {
        "freq_hz": raw["freq_hz"],
        "fs_in": int(raw["fs_in"]),
        "pre_gain_db": float(raw["pre_gain_db"]),
        "irs": raw["irs"].astype(np.float64),
        "firs": firs,
        "channels": channels,
        "mixed_phase": mixed_phase_from_arrays(raw),
    }


def write_design(
    result: DesignResult,
    out_dir: str | Path,
    replace: bool = False,
    extra: dict[str, Any] | None = None,
) -> list[dict[str, Any]]:
    """Write the FIR filters, curves and manifest of a design.

    Parameters
    ----------
    result : DesignResult
    out_dir : path-like
        Created if missing. Refused if it already holds a design, unless
        ``replace``.
    extra : dict, optional
        More top-level manifest fields (e.g. which measurement was used).

    Returns
    -------
    list of dict
        The manifest's file entries.
    """
    out = Path(out_dir)
    _check_out_dir(out, replace)
    old_files: set[str] = set()
    if replace and (out / MANIFEST).exists():
        with contextlib.suppress(OutputError):
            old_files = {e["path"] for e in read_manifest(out).get("files", [])}
    created_dirs = [d for d in (out, out / "fir") if not d.exists()]
    written: list[Path] = []
    entries: list[dict[str, Any]] = []
    stats = {(s.fs, s.channel): s for s in result.stats}
    latency = latency_record(getattr(result, "mixed_phase", None))
    try:
        out.mkdir(parents=True, exist_ok=True)
        for fs, h in result.firs.items():
            rate_dir = out / "fir" / str(fs)
            if not rate_dir.exists():
                created_dirs.append(rate_dir)
                rate_dir.mkdir(parents=True)
            for ch in result.channels:
                rel = f"fir/{fs}/{ch.name}.wav"
                path = out / rel
                existed = path.exists()
                write_wav(path, h[ch.index].astype(np.float32), fs, subtype="FLOAT")
                if not existed:
                    written.append(path)
                s = stats[(fs, ch.index)]
                entries.append(
                    {
                        "path": rel,
                        "kind": "fir",
                        "channel": ch.index,
                        "channel_name": ch.name,
                        "sample_rate": fs,
                        "taps": s.n_taps,
                        "peak_gain_db": round(s.peak_gain_db, 3),
                        "worst_case_gain_db": round(s.worst_case_gain_db, 3),
                        "max_boost_db": round(s.max_boost_db, 3),
                        "latency_samples": latency.get("samples", {}).get(str(fs), 0),
                        "sha256": sha256_of(path),
                    }
                )
        curves_path = out / CURVES
        existed = curves_path.exists()

        def _save(tmp: Path) -> None:
            with open(tmp, "wb") as fh:
                np.savez_compressed(fh, **_curves_dict(result))

        atomic_write_with(curves_path, _save)
        if not existed:
            written.append(curves_path)
        entries.append({"path": CURVES, "kind": "curves", "sha256": sha256_of(curves_path)})
        manifest: dict[str, Any] = {
            "format_version": FORMAT_VERSION,
            "generator": "roomcorr",
            "pre_gain_db": round(result.pre_gain_db, 3),
            "channels": [
                {"index": c.index, "name": c.name, "band_hz": list(c.band_hz)}
                for c in result.channels
            ],
            "files": entries,
            "settings": settings_to_dict(result.settings),
            "latency": latency,
        }
        if extra:
            manifest.update(extra)
        write_manifest(out, manifest)
    except BaseException:
        for p in written:
            with contextlib.suppress(FileNotFoundError):
                p.unlink()
        for d in reversed(created_dirs):
            with contextlib.suppress(OSError):
                d.rmdir()
        raise
    for rel in old_files - {e["path"] for e in entries}:
        with contextlib.suppress(FileNotFoundError):
            (out / rel).unlink()
    return entries
