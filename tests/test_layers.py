"""The package layout: no module imports from a later stage.

The order is the one of DESIGN.md ("Package layout"): measure -> analysis ->
design -> deliver/report -> app -> cli/ui, with shared infrastructure below
them all. Imports are read with :mod:`ast` (inside functions too), so a lazy
import is no way around the rule.
"""

from __future__ import annotations

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "roomcorr"

#: Stages in order; a module may import from its own stage and earlier ones.
#: The longest matching prefix decides (``roomcorr.deliver.atomic`` is infrastructure:
#: every stage writes files through it).
STAGES: list[tuple[str, tuple[str, ...]]] = [
    (
        "infrastructure",
        (
            "roomcorr.errors",
            "roomcorr.checked",
            "roomcorr.grid",
            "roomcorr.settings",
            "roomcorr.audio_io",
            "roomcorr.deliver.atomic",
            # the room and loudspeaker model: pure numpy, used by demo, evaluation, placement
            "roomcorr.physics",
            # IEC 61260-1 band centres: a table with no roomcorr imports, used by measure/ too
            "roomcorr.analysis.bands",
        ),
    ),
    ("measure", ("roomcorr.measure", "roomcorr.rooms", "roomcorr.demo")),
    ("analysis", ("roomcorr.analysis",)),
    ("design", ("roomcorr.design", "roomcorr.pipeline")),
    ("deliver/report", ("roomcorr.deliver", "roomcorr.report", "roomcorr.playback")),
    ("app", ("roomcorr.app", "roomcorr.evaluation", "roomcorr.placement")),
    ("cli/ui", ("roomcorr.cli", "roomcorr.ui", "roomcorr.__main__")),
]

#: Backward imports that are known and waiting for their move (importer, imported module).
KNOWN = {
    # read_ir_set refuses files that do not look like impulse responses
    ("roomcorr.audio_io", "roomcorr.analysis.plausibility"),
}


def _stage(module: str) -> int | None:
    best: tuple[int, int] | None = None
    for i, (_name, prefixes) in enumerate(STAGES):
        for p in prefixes:
            if (module == p or module.startswith(p + ".")) and (best is None or len(p) > best[1]):
                best = (i, len(p))
    return None if best is None else best[0]


def _module_name(path: Path) -> str:
    parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _imports(path: Path) -> set[str]:
    """Modules of roomcorr imported anywhere in ``path`` (``from X import y``: X, and X.y
    when that is a module)."""
    out: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom) and node.module and node.module.startswith("roomcorr"):
            out.add(node.module)
            for alias in node.names:
                sub = f"{node.module}.{alias.name}"
                if (PACKAGE.parent / Path(*sub.split("."))).with_suffix(".py").is_file() or (
                    PACKAGE.parent / Path(*sub.split(".")) / "__init__.py"
                ).is_file():
                    out.add(sub)
        elif isinstance(node, ast.Import):
            out |= {a.name for a in node.names if a.name.startswith("roomcorr")}
    return out


def backward_imports() -> set[tuple[str, str]]:
    found = set()
    for path in sorted(PACKAGE.rglob("*.py")):
        me = _module_name(path)
        mine = _stage(me)
        if mine is None:
            continue
        for target in _imports(path):
            theirs = _stage(target)
            if theirs is not None and theirs > mine:
                found.add((me, target))
    return found


def test_stage_of_a_module():
    assert _stage("roomcorr.deliver.atomic") == 0
    assert _stage("roomcorr.deliver.export") == 4
    assert _stage("roomcorr.rooms.runs") == 1
    assert _stage("roomcorr.app.compare") == 5
    assert _stage("roomcorr.analysis.bands") == 0
    assert _stage("roomcorr.analysis.decay") == 2
    assert _stage("numpy") is None


def test_the_check_sees_a_backward_import(tmp_path, monkeypatch):
    # A lazy import inside a function counts as much as one at the top.
    fake = tmp_path / "roomcorr" / "analysis" / "fake.py"
    fake.parent.mkdir(parents=True)
    fake.write_text("def f():\n    from roomcorr.design.realise.fir import synthesize_fir\n")
    monkeypatch.setattr(f"{__name__}.PACKAGE", tmp_path / "roomcorr")
    assert backward_imports() == {("roomcorr.analysis.fake", "roomcorr.design.realise.fir")}


def test_no_module_imports_from_a_later_stage():
    new = sorted(backward_imports() - KNOWN)
    assert not new, "imports from a later stage (DESIGN.md, Package layout): " + ", ".join(
        f"{a} -> {b}" for a, b in new
    )


def test_known_exceptions_are_still_real():
    # A move that removes one of them must also remove it from KNOWN.
    stale = sorted(KNOWN - backward_imports())
    assert not stale, "no longer imported, remove from KNOWN: " + ", ".join(
        f"{a} -> {b}" for a, b in stale
    )
