"""One self-contained HTML page (plus PNG files) about a design or a measurement session.

:func:`build_report` turns the curves of a design (layout of
:func:`roomcorr.deliver.export.load_design_curves`) into sections with figures and
tables; :func:`render_html` makes the page (figures embedded as base64 PNG,
inline styles, no network access); :func:`write_report` does the file work
for ``roomcorr report DIR``: it reads DIR, writes ``DIR/report/*.png`` and
``DIR/report.html`` through the atomic-write helper, and adds them to the
manifest of a design folder.
"""

from __future__ import annotations

import base64
import html
import os
import shutil
from pathlib import Path
from typing import Any

from roomcorr import rooms
from roomcorr.checked import read_json
from roomcorr.deliver.atomic import (
    atomic_write_bytes,
    atomic_write_text,
    disk_error_text,
    holds_working_folder,
    sha256_of,
    staged_copy,
    staged_folder,
)
from roomcorr.deliver.export import (
    check_folder_target,
    design_differences,
    load_design_curves,
)
from roomcorr.deliver.figures import figures_of_manifest
from roomcorr.deliver.loading import file_groups
from roomcorr.deliver.manifest import add_manifest_entries, read_manifest, write_manifest
from roomcorr.errors import InputFileError, OutputError, RoomcorrError
from roomcorr.report import figures as fg
from roomcorr.report import glance
from roomcorr.report.causes import causes_section
from roomcorr.report.channels import CHANNEL_SECTIONS, channel_section
from roomcorr.report.context import channel_of, report_context
from roomcorr.report.earlier import comparison_section, comparison_sentence
from roomcorr.report.files import files_parts
from roomcorr.report.impulse import TIME_INTRO_MIXED
from roomcorr.report.parts import SECTION_TITLES, Figure, Report, Section
from roomcorr.report.quality import quality_section
from roomcorr.report.safety import safety_section
from roomcorr.report.sources import (
    header_facts,
    read_iir,
    read_quality,
    read_through,
    session_curves,
)
from roomcorr.report.summary import summary_sentences
from roomcorr.report.system import system_sections
from roomcorr.report.through import through_section, through_sentence
from roomcorr.rooms import refuse_finished_run

REPORT_HTML = "report.html"
FIG_DIR = "report"


def build_report(
    curves: dict[str, Any],
    settings: dict[str, Any] | None = None,
    quality: list[dict[str, Any]] | None = None,
    iir: dict[str, list[dict[str, Any]]] | None = None,
    title: str = "Room correction report",
    dpi: int = 90,
    comparison: dict[str, Any] | None = None,
    through: dict[str, Any] | None = None,
    facts: list[str] | None = None,
    figures: dict[str, Any] | None = None,
    files: tuple[list[dict[str, Any]], str] | None = None,
    causes: list[dict[str, Any]] | None = None,
) -> Report:
    """Compute every section and figure of the report.

    Sections come in :data:`SECTION_TITLES` order; the per-channel ones
    (:data:`CHANNEL_SECTIONS`) hold one :class:`Column` per loudspeaker channel,
    drawn side by side.

    Parameters
    ----------
    curves : dict
        Layout of :func:`roomcorr.deliver.export.load_design_curves`. A measurement
        session without a design gives ``channels`` with only ``name``,
        ``index``, ``measured_db``, ``average_db`` and ``firs`` empty; the
        design sections are then left out.
    settings : dict, optional
        :func:`roomcorr.settings.settings_to_dict` of the design (caps in force).
    quality : list of dict, optional
        Per-recording quality figures (:func:`quality_from_record`).
    iir : dict, optional
        Channel name -> the ``iir/<rate>/<name>.json`` documents of a biquad
        design (one per rate), when the design has one.
    title : str
    dpi : int
        Resolution of the PNGs.
    comparison : dict, optional
        :func:`roomcorr.app.compare.compare_measurements` result (``with_curves=True``)
        against an earlier measurement; adds the comparison section after the
        overview. Left out when None.
    through : dict, optional
        ``through.check`` of a ``measurement.json`` made with ``measure
        --through``: the responses measured through a design's filters
        against that design's prediction (see :func:`through_section`).
    facts : list of str, optional
        Lines under the title (:func:`roomcorr.report.glance.header_lines`).
    figures : dict, optional
        The manifest's figures block (:func:`roomcorr.deliver.figures.figures_of_manifest`):
        the overview and the safety section state these numbers, never their own.
    files : (list of dict, str), optional
        The design's file groups (:func:`roomcorr.deliver.loading.file_groups`)
        and folder name: adds the section on the files and how to load them.
    causes : list of dict, optional
        ``causes`` of the design's manifest (one entry per channel, each with its
        list of causes, :func:`roomcorr.app.placement.causes_for_design`).

    Returns
    -------
    Report
    """

    def png(fig: Any) -> bytes:
        return fg.png_bytes(fig, dpi=dpi)

    ctx = report_context(curves, settings, png, iir, figures)
    designed = ctx.designed
    overview = Section("overview", SECTION_TITLES["overview"])
    if designed:
        overview.paragraphs.extend(
            glance.glance_sentences(curves, ctx.caps["max_boost_db"], ctx.figures)
        )
    else:
        overview.paragraphs.append(
            "This folder holds measurements only; run the design step to see a correction."
        )
    sections = [overview]
    if comparison is not None:
        sections.append(comparison_section(comparison))
        overview.paragraphs.append(comparison_sentence(comparison))
    if designed:  # every sentence, channel by channel, below the short overview
        changes = Section("changes", SECTION_TITLES["changes"])
        changes.paragraphs.extend(
            summary_sentences(curves, ctx.caps["max_boost_db"], ctx.figures, latency=False)
        )
        sections.append(changes)
    if designed:
        sections.extend(system_sections(curves, png))
    chans = [channel_of(curves, ch, ctx) for ch in curves["channels"]]
    for sec_id, intro, build in CHANNEL_SECTIONS:
        if sec_id == "time" and ctx.mixed:
            intro = TIME_INTRO_MIXED
        sec = channel_section(sec_id, intro, chans, ctx, build)
        if sec is not None:
            sections.append(sec)
    if ctx.ringing_notes and designed:
        overview.paragraphs.append(
            "Loudest ringing after the sound stops: " + "; ".join(ctx.ringing_notes)
            + " (see the low-frequency decay maps)."
        )
    if causes and any(e.get("causes") for e in causes):
        sections.append(causes_section(causes))
    if quality:
        sections.append(quality_section(quality, png))
    if through and "measured_db" in through:
        sections.append(through_section(through, [str(c["name"]) for c in curves["channels"]], png))
        overview.paragraphs.append(through_sentence(through))
    if designed:
        sections.append(safety_section(chans, curves, ctx))
    if designed and files is not None:
        table, paragraphs = files_parts(*files)
        sections.append(Section("files", SECTION_TITLES["files"], paragraphs, table=table))
    return Report(title=title, subtitle=f"measured at {ctx.fs} Hz", sections=sections,
                  facts=list(facts or []))


_CSS = """
body{margin:0;font-family:system-ui,-apple-system,'Segoe UI',sans-serif;color:#24313f;
background:#f6f7f9;line-height:1.45}
header{background:#155e6b;color:#fff;padding:18px 28px}
header h1{margin:0;font-size:1.5em}header p{margin:4px 0 0;opacity:.85}
header p.fact{font-size:.92em;opacity:.95}
nav{background:#e3eaef;padding:8px 28px;font-size:.9em}
nav a{color:#155e6b;margin-right:14px;text-decoration:none}
main{max-width:1760px;margin:0 auto;padding:10px 20px 40px}
section{background:#fff;border-radius:6px;margin:18px 0;padding:14px 22px;
box-shadow:0 1px 2px rgba(0,0,0,.08)}
section h2{font-size:1.2em;color:#155e6b;margin:4px 0 10px;border-bottom:2px solid #e3eaef}
#overview{border-left:6px solid #c8553d}
#safety{border-left:6px solid #b8892b}
figure{margin:12px 0}figure img{max-width:100%;height:auto;display:block}
figcaption{font-size:.85em;color:#5b6877}
table{border-collapse:collapse;font-size:.9em;margin:8px 0}
td,th{border:1px solid #d5dce3;padding:3px 10px;text-align:right}
th{background:#eef2f5}
#compare td:last-child{text-align:left}
.channels{display:grid;grid-template-columns:repeat(auto-fit,minmax(min(100%,480px),1fr));
gap:8px 24px;align-items:start}
.channel{min-width:0}.channel h3{margin:8px 0 2px;font-size:1.05em;color:#155e6b}
.scroll{overflow-x:auto}
details{margin:6px 0}summary{cursor:pointer;color:#155e6b}
"""


def _render_block(paragraphs: list[str], table: list[list[str]] | None,
                  figures: list[Figure]) -> list[str]:
    """Paragraphs, table and figures of a section or a column, as HTML pieces."""
    esc = html.escape
    parts = [f"<p>{esc(p)}</p>" for p in paragraphs]
    if table:
        head = "".join(f"<th>{esc(h)}</th>" for h in table[0])
        body = "".join(
            "<tr>" + "".join(f"<td>{esc(v)}</td>" for v in row) + "</tr>" for row in table[1:]
        )
        parts.append(f'<div class="scroll"><table><thead><tr>{head}</tr></thead>'
                     f"<tbody>{body}</tbody></table></div>")
    for f in figures:
        b64 = base64.b64encode(f.png).decode("ascii")
        parts.append(
            f'<figure data-figure="{esc(f.key)}"><img alt="{esc(f.caption)}" '
            f'src="data:image/png;base64,{b64}"><figcaption>{esc(f.caption)}</figcaption>'
            "</figure>"
        )
    return parts


def render_html(report: Report) -> str:
    """The page as one string: inline CSS, figures as base64 data URIs, no external links.

    A section's channel columns sit side by side in a CSS grid (one below the
    other on a narrow window); no script is needed.
    """
    esc = html.escape
    nav = " ".join(f'<a href="#{esc(s.id)}">{esc(s.title)}</a>' for s in report.sections)
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{esc(report.title)}</title><style>{_CSS}</style></head><body>",
        f"<header><h1>{esc(report.title)}</h1><p>{esc(report.subtitle)}</p>"
        + "".join(f'<p class="fact">{esc(line)}</p>' for line in report.facts)
        + "</header>",
        f"<nav>{nav}</nav><main>",
    ]
    for s in report.sections:
        parts.append(f'<section id="{esc(s.id)}"><h2>{esc(s.title)}</h2>')
        if s.id == "overview" and s.paragraphs:
            parts.append("<ul>" + "".join(f"<li>{esc(p)}</li>" for p in s.paragraphs) + "</ul>")
            parts.extend(_render_block([], s.table, s.figures))
        else:
            parts.extend(_render_block(s.paragraphs, s.table, s.figures))
        if s.columns:
            parts.append('<div class="channels">')
            for c in s.columns:
                parts.append(f'<div class="channel" id="{esc(s.id)}-{esc(c.channel)}" '
                             f'data-channel="{esc(c.channel)}"><h3>{esc(c.channel)}</h3>')
                parts.extend(_render_block(c.paragraphs, [], []))
                if c.details:
                    summary, paras = c.details
                    parts.append(f"<details><summary>{esc(summary)}</summary>")
                    parts.extend(_render_block(paras, [], []))
                    parts.append("</details>")
                parts.extend(_render_block([], c.table, c.figures))
                parts.append("</div>")
            parts.append("</div>")
        parts.append("</section>")
    parts.append("</main></body></html>")
    return "\n".join(parts)


def _ours(d: Path) -> bool:
    """Whether folder ``d`` was written by roomcorr (a design, a measurement or a room run),
    so its report may go into it; someone else's folder of WAVs is never written to."""

    if (d / "complete.json").is_file():
        return True
    if (d / "manifest.json").is_file():
        try:
            return read_manifest(d).get("generator") == "roomcorr"
        except OutputError:
            return False
    try:
        record = read_json(d / "measurement.json", "measurement.json")
    except RoomcorrError:
        return False
    return isinstance(record, dict)


def report_destination(folder: str | Path, out_dir: str | Path | None = None) -> Path:
    """The folder ``roomcorr report FOLDER [--out OUT_DIR]`` writes into.

    Default: ``folder`` itself when roomcorr wrote it (a design folder, a
    measurement folder, a run of a room: the report goes beside the run as
    before), else a new folder ``<name>-report`` in the working folder. A
    given or default folder must be new, empty or hold an earlier report only.

    Raises
    ------
    OutputError
        For a destination that is a link, a file, a finished room run (other
        than the reported run itself), or a folder holding other files.
    """

    d = Path(folder)
    if out_dir is None:
        dest = d if _ours(d) else Path.cwd() / f"{d.resolve().name}-report"
        option = "report" if dest == d else f"report (default --out {dest})"
    else:
        dest = Path(out_dir)
        option = f"--out {out_dir}"
    check_folder_target(dest, option)
    if dest.exists() and dest.resolve() == d.resolve():
        return dest  # the folder itself (a finished run: its report goes beside its files)
    refuse_finished_run(dest, option)
    if not dest.exists():
        return dest
    others = sorted(p.name for p in dest.iterdir() if p.name not in (REPORT_HTML, FIG_DIR))
    if others:
        raise OutputError(
            f"{option}: holds {others[0]}, which is not a roomcorr report; choose a new or "
            "empty folder with --out"
        )
    return dest


def check_report_folder(folder: str | Path) -> None:
    """Raise :class:`~roomcorr.errors.InputFileError` unless ``folder`` can be reported:
    it must exist, and must not be a damaged run of a room (named, not reported)."""

    d = Path(folder)
    if not d.is_dir():
        raise InputFileError(f"{d}: no such folder; give a design or measurement folder")
    rooms.verified(rooms.find_room(d), d)


def write_report(
    folder: str | Path,
    dpi: int = 90,
    comparison: dict[str, Any] | None = None,
    out_dir: str | Path | None = None,
) -> Path:
    """Write ``report.html`` and ``report/*.png`` about a design or measurement folder.

    Parameters
    ----------
    folder : path
        A design output folder (``manifest.json`` + ``design.npz``) or a
        measurement session folder (impulse-response WAVs, optional
        ``measurement.json``).
    dpi : int
    comparison : dict, optional
        The comparison section's data
        (:func:`roomcorr.app.report.report_comparison` works it out); without
        it the report has no comparison section.
    out_dir : path, optional
        Where to write (see :func:`report_destination` for the default).

    Returns
    -------
    Path of ``report.html``.

    Notes
    -----
    The figures are written into a temporary folder that replaces
    ``report/`` only when all of them and ``report.html`` are complete, so
    an interrupted or failed report leaves the earlier one whole and nothing
    half-written; a new destination folder appears only when it is complete.
    """

    d = Path(folder)
    check_report_folder(d)
    dest = report_destination(d, out_dir)
    is_design = (d / "manifest.json").is_file() and (d / "design.npz").is_file()
    settings = None
    through = None
    if is_design:
        if not (d / "complete.json").is_file():  # a run of a room is checked by its record
            # every file the manifest lists, with its SHA-256, and nothing else: a deleted
            # or changed filter is named, never redrawn from design.npz
            changed = design_differences(d)
            if changed:
                more = f" (and {len(changed) - 1} more)" if len(changed) > 1 else ""
                raise OutputError(
                    f"{d}: the design folder changed since it was written: {changed[0]}{more}; "
                    "design again (--replace) to make it whole"
                )
        curves = load_design_curves(d)
        manifest = read_manifest(d)
        settings = manifest.get("settings")
        figures = figures_of_manifest(manifest)
        quality = None
        for src in manifest.get("measurements") or []:  # the folder the IRs came from
            parent = Path(str(src)).parent
            if not parent.is_absolute():
                parent = Path.cwd() / parent
            if (parent / "measurement.json").is_file():
                quality = read_quality(parent)
                break
    else:
        figures = None
        curves = session_curves(d)
        quality = read_quality(d)
        through = read_through(d)
    iir = read_iir(d) if is_design else None
    facts = header_facts(d, manifest if is_design else None, curves)
    report = build_report(
        curves, settings, quality, iir=iir, dpi=dpi, comparison=comparison, through=through,
        facts=facts,
        figures=figures,
        files=(file_groups(manifest), d.name) if is_design else None,
        causes=manifest.get("causes") if is_design else None,
    )
    basis = manifest.get("timing_basis") if is_design else None
    if isinstance(basis, dict) and isinstance(basis.get("label"), str):
        report.sections[0].paragraphs.append(  # the manifest's words (measure/timing.py)
            f"Timing basis of the measurement behind this design: {basis['label']}."
        )
    # A finished room run is sealed by its complete.json (SHA-256 of every file,
    # manifest included): the report is added beside it, never into its manifest.
    same = dest.resolve() == d.resolve()
    _write_report_files(
        dest, report, list_in_manifest=same and is_design and not (d / "complete.json").is_file()
    )
    return dest / REPORT_HTML


def _list_report_in_manifest(d: Path, written: list[str]) -> None:
    manifest = read_manifest(d)
    known = {e.get("path") for e in manifest.get("files", [])}
    if known & {*written, REPORT_HTML}:  # a report written before: refresh its digests
        manifest["files"] = [
            e
            for e in manifest["files"]
            if not str(e["path"]).startswith(f"{FIG_DIR}/") or e["path"] in written
        ]  # figures the new report no longer has went with the old report/
        for e in manifest["files"]:
            if e.get("path") in {*written, REPORT_HTML}:
                e["sha256"] = sha256_of(d / e["path"])
        write_manifest(d, manifest)
    entries = [{"path": p, "kind": "report-figure"} for p in written if p not in known]
    if REPORT_HTML not in known:
        entries.append({"path": REPORT_HTML, "kind": "report"})
    if entries:
        add_manifest_entries(d, entries)


def _write_report_files(dest: Path, report: Report, list_in_manifest: bool) -> list[str]:
    """Write the figures and the page (and their manifest entries) into ``dest``, all or
    nothing: the folder is built beside ``dest`` and swapped in when complete."""


    figures = [f for s in report.sections for f in s.all_figures()]
    written = [f"{FIG_DIR}/{f.key}.png" for f in figures]
    page = render_html(report)
    # ``roomcorr report .``: the folder is replaced as a whole like any other (all or
    # nothing under a kill); this process then stands in the new folder, and a shell
    # standing in the old one finds the new one with ``cd .`` (the command says so).
    here = dest.exists() and holds_working_folder(dest)
    absolute = dest.resolve()
    try:
        with staged_copy(absolute) if dest.exists() else staged_folder(absolute) as stage:
            if (stage / FIG_DIR).is_dir():
                shutil.rmtree(stage / FIG_DIR)  # links to the old figures; they stay intact
            (stage / FIG_DIR).mkdir()
            for f, rel in zip(figures, written, strict=True):
                atomic_write_bytes(stage / rel, f.png)
            atomic_write_text(stage / REPORT_HTML, page)
            if list_in_manifest:
                _list_report_in_manifest(stage, written)
        if here:
            os.chdir(absolute)
    except OSError as exc:
        raise OutputError(f"{dest}: cannot write the report ({disk_error_text(exc)})") from None
    return written
