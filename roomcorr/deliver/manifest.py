"""A design folder's ``manifest.json``: read and check it, write it, add entries.

The manifest lists every file of a design with its safety figures and SHA-256.
It is its own module because both writers (:mod:`roomcorr.deliver.export` for the
FIR filters, :mod:`roomcorr.deliver.export_iir` for the biquads) and the report
add to it.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

from roomcorr.checked import read_json
from roomcorr.deliver.atomic import PathEscapeError, atomic_write_text, contained, sha256_of
from roomcorr.deliver.figures import figures_of_manifest
from roomcorr.errors import OutputError

MANIFEST = "manifest.json"


def _manifest_problem(doc: Any, out: Path) -> str | None:
    """Why a parsed manifest is unusable (None when it is fine)."""
    if not isinstance(doc, dict):
        return f"expected a JSON object, found {type(doc).__name__}"
    files = doc.get("files")
    if not isinstance(files, list):
        return "'files' is missing or not a list"
    for e in files:
        if not isinstance(e, dict) or not isinstance(e.get("path"), str):
            return "a 'files' entry has no 'path'"
        try:
            contained(out, e["path"])
        except PathEscapeError as exc:
            return f"names a file outside the folder ({exc})"
        for key in _NUMERIC_ENTRY_KEYS:
            if key in e and _finite(e[key]) is None:
                return f"{e['path']}: '{key}' is not a finite number"
        digest = e.get("sha256")
        if digest is not None and not (
            isinstance(digest, str) and len(digest) == 64 and _is_hex(digest)
        ):
            return f"{e['path']}: 'sha256' is not a SHA-256 digest"
    if "pre_gain_db" in doc and _finite(doc["pre_gain_db"]) is None:
        return "'pre_gain_db' is not a finite number"
    if "figures" in doc:
        try:
            figures_of_manifest(doc)
        except (ValueError, TypeError) as exc:
            return str(exc)
    for key in ("settings", "channels"):
        if key in doc and not isinstance(doc[key], dict if key == "settings" else list):
            return f"'{key}' has the wrong type"
    # the shapes the report, history and app read (each reader indexes them as such)
    for key in ("design", "measure"):
        if not isinstance((doc.get("settings") or {}).get(key, {}), dict):
            return f"'settings.{key}' is not a table"
    for key in ("measurements", "inputs"):
        if key in doc and not isinstance(doc[key], list):
            return f"'{key}' is not a list"
    if not all(isinstance(m, str) for m in doc.get("measurements") or []):
        return "'measurements' is not a list of file names"
    if not all(isinstance(e, dict) for e in [*(doc.get("inputs") or []), *doc.get("channels", [])]):
        return "'inputs' or 'channels' holds something other than tables"
    return None


_NUMERIC_ENTRY_KEYS = (
    "sample_rate",
    "taps",
    "channel",
    "peak_gain_db",
    "worst_case_gain_db",
    "max_boost_db",
    "pre_gain_db",
)


def _finite(v: Any) -> float | None:
    """``v`` as a float when it is a finite JSON number, else None."""
    if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v):
        return None
    return float(v)


def _is_hex(text: str) -> bool:
    try:
        int(text, 16)
    except ValueError:
        return False
    return True


def read_manifest(out_dir: str | Path) -> dict[str, Any]:
    """Read and check ``manifest.json`` of a design folder.

    Raises
    ------
    OutputError
        If it is missing, not valid JSON, not shaped like a manifest, or names
        a file outside the folder (a damaged or tampered manifest).
    """
    out = Path(out_dir)
    p = out / MANIFEST
    if not p.exists() and not p.is_symlink():
        raise OutputError(f"{p}: no manifest; is {out_dir} a design folder?")
    try:  # size, nesting and number limits: a damaged file is one line, never a traceback
        doc = read_json(p, "manifest", OutputError)
    except OutputError as exc:
        raise OutputError(f"damaged manifest: {exc}") from None
    problem = _manifest_problem(doc, out)
    if problem:
        raise OutputError(f"{p}: damaged manifest: {problem}")
    return doc


def write_manifest(out_dir: str | Path, manifest: dict[str, Any]) -> Path:
    """Write ``manifest.json`` atomically (strict JSON: a NaN or infinity is refused)."""
    text = json.dumps(manifest, indent=2, allow_nan=False) + "\n"
    return atomic_write_text(Path(out_dir) / MANIFEST, text)


def add_manifest_entries(out_dir: str | Path, entries: list[dict[str, Any]]) -> None:
    """Append file entries (with their SHA-256 filled in) to a folder's manifest."""
    manifest = read_manifest(out_dir)
    for e in entries:
        e = dict(e)
        e.setdefault("sha256", sha256_of(contained(out_dir, e["path"])))
        manifest["files"].append(e)
    write_manifest(out_dir, manifest)
