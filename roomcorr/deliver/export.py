"""Writers for a design: FIR WAVs, ``design.npz`` curves and ``manifest.json``.

Layout of a design output folder::

    DIR/manifest.json           every file written, with its safety figures and SHA-256
    DIR/design.npz              the curves (for reports and comparisons)
    DIR/fir/48000/left.wav      one 32-bit float WAV per channel and sample rate

Every file goes through :mod:`roomcorr.deliver.atomic`. All filters are computed
before the first file is written, and the folder is built as a whole in a
temporary sibling and swapped in when complete: an interruption (kill,
Ctrl-C, full disk) leaves the earlier folder whole and nothing half-written.
A folder that already holds a design is never overwritten silently, and only
files inside the output folder are ever written or removed: a manifest naming
anything outside is refused as damaged.
"""

from __future__ import annotations

import contextlib
import shutil
import zipfile
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from roomcorr.audio_io import write_wav
from roomcorr.deliver.atomic import (
    TMP_PREFIX,
    atomic_write_with,
    clean_stale,
    disk_error_text,
    holds_working_folder,
    sha256_of,
    staged_folder,
)
from roomcorr.deliver.export_iir import write_iir
from roomcorr.deliver.figures import design_figures
from roomcorr.deliver.manifest import MANIFEST, read_manifest, write_manifest
from roomcorr.deliver.system import manifest_fields, system_curves, write_extra_formats
from roomcorr.design.curve.area import area_arrays_of, area_fields_of
from roomcorr.design.phase.mixedphase import from_arrays as mixed_phase_from_arrays
from roomcorr.design.phase.mixedphase import latency_record
from roomcorr.design.phase.mixedphase import to_arrays as mixed_phase_arrays
from roomcorr.errors import OutputError
from roomcorr.rooms import refuse_finished_run
from roomcorr.settings import find_preset, settings_to_dict

if TYPE_CHECKING:
    from roomcorr.pipeline import DesignResult

CURVES = "design.npz"
FORMAT_VERSION = 1


def input_digests(
    measurements: list[Path], calibration: str | None = None, target: str | None = None
) -> list[dict[str, Any]]:
    """SHA-256 of every input of a design, for the manifest's ``inputs`` list.

    Parameters
    ----------
    measurements : list of Path
        The impulse-response files, in position order.
    calibration : str, optional
        Microphone calibration file.
    target : str, optional
        Target preset name or file; for a preset, the preset file is hashed.

    Returns
    -------
    list of dict
        ``{"role", "path", "sha256", "size"}`` per input file.
    """
    items: list[tuple[str, Path]] = [("measurement", Path(m)) for m in measurements]
    if calibration:
        items.append(("calibration", Path(calibration)))
    if target:
        preset = find_preset(target)
        items.append(("target", Path(preset) if preset is not None else Path(target)))
    out = []
    for role, p in items:
        if p.is_file():
            out.append(
                {
                    "role": role,
                    "path": str(p.resolve()),
                    "sha256": sha256_of(p),
                    "size": p.stat().st_size,
                }
            )
    return out


def _folder_entries(out: Path) -> list[str]:
    """Every file below ``out`` (relative POSIX paths), symbolic links included."""
    found = []
    for p in out.rglob("*"):
        if p.is_symlink() or not p.is_dir():
            found.append(p.relative_to(out).as_posix())
    return sorted(found)


def design_differences(out_dir: str | Path) -> list[str]:
    """How a design folder differs from its manifest (empty when it is whole).

    Lists, as ``"<path>: <what>"``, every listed file that is missing or whose
    SHA-256 differs, and every file present that the manifest does not list.

    Raises
    ------
    OutputError
        For a missing or damaged manifest.
    """
    out = Path(out_dir)
    listed = {e["path"]: e.get("sha256") for e in read_manifest(out)["files"]}
    problems = []
    for rel, digest in listed.items():
        p = out / rel
        if not p.is_file():
            problems.append(f"{rel}: missing")
        elif digest and sha256_of(p) != digest:
            problems.append(f"{rel}: SHA-256 differs")
    for rel in _folder_entries(out):
        if rel != MANIFEST and rel not in listed and not Path(rel).name.startswith(TMP_PREFIX):
            problems.append(f"{rel}: not listed")
    return problems


def check_folder_target(out: Path, label: str) -> None:
    """Refuse a link, a file, or a folder whose parent does not exist as an output folder
    (``label`` names it in the message); first tidy what an interrupted run left beside it."""
    if out.parent.is_dir():
        clean_stale(out.parent, out.name)
    if out.is_symlink():
        raise OutputError(f"{label}: is a symbolic link; give the folder it points to")
    if out.exists() and not out.is_dir():
        raise OutputError(f"{label}: exists and is not a folder")
    if not out.parent.is_dir():
        raise OutputError(f"{label}: {out.parent} is not an existing folder")


def check_out_dir(out: Path, replace: bool) -> None:
    """Refuse an output folder that must not be written (see :func:`write_design`).

    First tidies what an interrupted earlier run left beside ``out``
    (:func:`roomcorr.deliver.atomic.clean_stale`), so the checks see the folder as it is.
    """
    check_folder_target(out, f"--out {out}")
    if holds_working_folder(out):
        raise OutputError(
            f"--out {out}: is the working folder (or holds it); give a folder to create, "
            "e.g. --out filters"
        )
    refuse_finished_run(out)
    if not out.is_dir():
        return
    present = [p for p in _folder_entries(out) if not Path(p).name.startswith(TMP_PREFIX)]
    if not present:
        return
    if not (out / MANIFEST).exists():
        raise OutputError(
            f"--out {out}: holds files but no roomcorr design ({present[0]}); choose a new "
            "or empty folder"
        )
    if not replace:
        raise OutputError(
            f"--out {out}: already holds a design; choose another folder or pass "
            "--replace to write over it"
        )
    manifest = read_manifest(out)  # refuses a damaged or tampered manifest
    known = {MANIFEST, *(e["path"] for e in manifest["files"])}
    foreign = [
        p for p in present if p not in known and not any(k.startswith(p + "/") for k in known)
    ]
    if foreign:
        raise OutputError(
            f"--out {out}: holds {foreign[0]}, which its manifest does not list; move it "
            "away first (--replace replaces the whole folder)"
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
        data.update({f"ch{c.index}_{k}": v for k, v in area_arrays_of(c).items()})
    for fs, h in result.firs.items():
        data[f"fir_{fs}"] = h
    data.update(system_curves(result))
    if getattr(result, "mixed_phase", None) is not None:
        data.update(mixed_phase_arrays(result.mixed_phase))
    return data


_DAMAGED_NPZ = (OSError, EOFError, ValueError, KeyError, TypeError, IndexError, zipfile.BadZipFile)


def load_design_curves(out_dir: str | Path, verify: bool = True) -> dict[str, Any]:
    """Load ``design.npz`` of a design folder into a dict.

    Returns a mapping with ``freq_hz``, ``fs_in``, ``pre_gain_db``, ``irs``
    (n_positions, n_channels, n_samples), ``firs`` (rate -> (n_channels,
    n_taps)) and ``channels``: a list of dicts with the keys of
    :class:`roomcorr.pipeline.ChannelDesign`.

    With ``verify`` (default), the file must match the SHA-256 its folder's
    manifest records for it, and every filter must be finite.

    Raises
    ------
    OutputError
        If the file is missing, changed since it was written, or damaged (not
        a zip archive, keys missing, wrong shapes, values not finite).
    """
    out = Path(out_dir)
    p = out / CURVES
    if not p.is_file():
        raise OutputError(f"{p}: missing; is {out_dir} a design folder?")
    if verify and (out / MANIFEST).is_file():
        entry = next((e for e in read_manifest(out)["files"] if e["path"] == CURVES), None)
        if entry is not None and entry.get("sha256") and sha256_of(p) != entry["sha256"]:
            raise OutputError(
                f"{p}: changed since it was written (SHA-256 differs from {MANIFEST}); design again"
            )
    try:
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
        curves = {
            "freq_hz": raw["freq_hz"],
            "fs_in": int(raw["fs_in"]),
            "pre_gain_db": float(raw["pre_gain_db"]),
            "irs": raw["irs"].astype(np.float64),
            "firs": firs,
            "channels": channels,
            "mixed_phase": mixed_phase_from_arrays(raw),
            "system": {k[len("sys_") :]: v for k, v in raw.items() if k.startswith("sys_")},
        }
    except _DAMAGED_NPZ as exc:
        raise OutputError(f"{p}: damaged ({type(exc).__name__}: {exc}); design again") from None
    bad = [rate for rate, h in firs.items() if h.ndim != 2 or not np.all(np.isfinite(h))]
    if bad or not np.isfinite(curves["pre_gain_db"]):
        raise OutputError(f"{p}: damaged (filter values not finite); design again")
    problem = _curves_problem(curves)
    if problem:
        raise OutputError(f"{p}: damaged ({problem}); design again")
    return curves


#: Curves of a channel that share the frequency grid (the last axis) in ``design.npz``.
_GRID_CURVES = ("average_db", "target_db", "correction_db", "measured_db")


def _curves_problem(curves: dict[str, Any]) -> str | None:
    """Why loaded design curves cannot be drawn or compared (None when they can)."""
    f = np.asarray(curves["freq_hz"])
    if f.ndim != 1 or f.size < 2 or not np.all(np.isfinite(f)) or not np.all(np.diff(f) > 0):
        return "freq_hz is not a rising grid of at least two frequencies"
    if np.asarray(curves["irs"]).ndim != 3 or curves["fs_in"] <= 0:
        return "the impulse responses are not shaped (positions, channels, samples)"
    if any(np.asarray(h).shape[0] != len(curves["channels"]) for h in curves["firs"].values()):
        return "a filter set does not have one filter per channel"
    for ch in curves["channels"]:
        for key in _GRID_CURVES:
            if key in ch and np.shape(ch[key])[-1:] != (f.size,):
                return f"{ch['name']} {key} does not match freq_hz"
    return None


def write_design(
    result: DesignResult,
    out_dir: str | Path,
    replace: bool = False,
    extra: dict[str, Any] | None = None,
    iir: Any = None,
) -> list[dict[str, Any]]:
    """Write the FIR filters, curves and manifest of a design (and its biquads).

    The whole design is built in a temporary sibling folder and swapped in
    when complete (:func:`roomcorr.deliver.atomic.staged_folder`): an interruption at
    any moment leaves either the earlier folder whole or the new one whole.

    Parameters
    ----------
    result : DesignResult
    out_dir : path-like
        Created if missing. Refused if it already holds a design, unless
        ``replace``; refused always if it holds files its manifest does not
        list (they would be lost), if it is a finished room run, or if it is
        a symbolic link.
    extra : dict, optional
        More top-level manifest fields (e.g. which measurement was used).
    iir : IirDesign, optional
        Biquad sets to write beside the FIR filters
        (:func:`roomcorr.deliver.export_iir.write_iir`).

    Returns
    -------
    list of dict
        The manifest's file entries.
    """
    out = Path(out_dir)
    check_out_dir(out, replace)
    try:
        with staged_folder(out) as stage:
            entries = _write_design_files(result, stage, extra)
            if iir is not None:
                entries = entries + write_iir(iir, stage, fir=result)
    except OSError as exc:
        why = disk_error_text(exc)
        raise OutputError(f"--out {out}: cannot write the design ({why})") from None
    except RuntimeError as exc:  # soundfile's LibsndfileError (e.g. disk full mid-WAV)
        if "Soundfile" not in type(exc).__name__ and "Libsndfile" not in type(exc).__name__:
            raise
        why = " ".join(str(exc).split())
        with contextlib.suppress(OSError):  # libsndfile does not say why; a full disk is likely
            if shutil.disk_usage(out.parent).free < (1 << 20):
                why = "no space left on the disk"
        raise OutputError(f"--out {out}: cannot write the design ({why})") from None
    return entries


def _write_design_files(
    result: DesignResult, out: Path, extra: dict[str, Any] | None
) -> list[dict[str, Any]]:
    entries: list[dict[str, Any]] = []
    stats = {(s.fs, s.channel): s for s in result.stats}
    latency = latency_record(getattr(result, "mixed_phase", None))
    for fs, h in result.firs.items():
        rate_dir = out / "fir" / str(fs)
        rate_dir.mkdir(parents=True, exist_ok=True)
        for ch in result.channels:
            rel = f"fir/{fs}/{ch.name}.wav"
            path = out / rel
            write_wav(path, h[ch.index].astype(np.float32), fs, subtype="FLOAT")
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
    entries += write_extra_formats(result, out, sha256_of)
    curves_path = out / CURVES

    def _save(tmp: Path) -> None:
        with open(tmp, "wb") as fh:
            np.savez_compressed(fh, **_curves_dict(result))

    atomic_write_with(curves_path, _save)
    entries.append({"path": CURVES, "kind": "curves", "sha256": sha256_of(curves_path)})
    manifest: dict[str, Any] = {
        "format_version": FORMAT_VERSION,
        "generator": "roomcorr",
        "pre_gain_db": round(result.pre_gain_db, 3),
        "channels": [
            {"index": c.index, "name": c.name, "band_hz": list(c.band_hz), **area_fields_of(c)}
            for c in result.channels
        ],
        "files": entries,
        "settings": settings_to_dict(result.settings),
        "latency": latency,
        # the figures every reader shows, computed once (roomcorr/deliver/figures.py)
        "figures": design_figures(entries, result.pre_gain_db, latency),
    }
    manifest.update(manifest_fields(result))
    if extra:
        manifest.update(extra)
    write_manifest(out, manifest)
    return entries
