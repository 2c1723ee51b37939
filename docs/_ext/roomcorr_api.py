"""Sphinx extension: the Python API reference, one section per public module.

A Markdown page holding the line ``<!-- roomcorr-api-reference -->`` gets, in its
place, an ``automodule`` block for every module of the ``roomcorr`` package whose
name does not start with an underscore, grouped by subpackage. New modules join
the reference without an edit here.
"""

from __future__ import annotations

import hashlib
import importlib
import pkgutil
import re
from typing import Any

from numpydoc.numpydoc import HASH_LEN

MARKER = "<!-- roomcorr-api-reference -->"
# Entry points, not an API: their behaviour is documented in the command reference.
SKIPPED = {"roomcorr.__main__", "roomcorr.cli"}


def public_modules() -> list[str]:
    """Names of roomcorr's public modules, packages first, in alphabetical order."""
    import roomcorr

    names = ["roomcorr"]
    for info in pkgutil.walk_packages(roomcorr.__path__, "roomcorr."):
        if any(part.startswith("_") for part in info.name.split(".")):
            continue
        if info.name in SKIPPED:
            continue
        names.append(info.name)
    return sorted(names)


def api_markdown() -> str:
    """MyST Markdown with one ``automodule`` directive per public module."""
    lines: list[str] = []
    current = None
    for name in public_modules():
        parts = name.split(".")
        group = ".".join(parts[:2])
        module = importlib.import_module(name)
        is_package = hasattr(module, "__path__")
        if group != current and (is_package or len(parts) == 2):
            current = group
            lines += ["", f"## `{group}`", ""]
        if name != group:
            lines += ["", f"### `{name}`", ""]
        lines += ["```{eval-rst}", f".. automodule:: {name}", "```", ""]
    return "\n".join(lines) + "\n"


_UNDERLINE = re.compile(r"^\s*([-=~^])\1{2,}\s*$")
_CITATION = re.compile(r"^(\s*\.\. )\[(\d+)\]")
_CITE_REF = re.compile(r"\[(\d+)\]_")


def _label(module: str, number: str) -> str:
    """numpydoc's own form of a citation label (``R`` + hash + ``-1``), per module.

    numpydoc shows such labels as ``[1]`` again in the built page.
    """
    digest = hashlib.sha256(("module:" + module).encode()).hexdigest()[:HASH_LEN]
    return f"R{digest}-{number}"


def _module_of(what: str, name: str) -> str:
    if what == "module":
        return name
    parts = name.split(".")
    for k in range(len(parts), 0, -1):
        candidate = ".".join(parts[:k])
        if candidate in _MODULES:
            return candidate
    return name


_MODULES: set[str] = set()


def _process_docstring(
    app: Any, what: str, name: str, obj: Any, options: Any, lines: list[str]
) -> None:
    """Make docstrings of many modules live together on one page.

    Module docstrings are plain reStructuredText (numpydoc leaves them alone): their
    underlined headings ("References", "Model") would become sections with clashing
    ids, so they become rubrics; their numbered citations ``.. [1]`` and the
    ``[1]_`` that point at them (also from the module's functions and classes) get
    a label of their module, so ``[1]`` of two modules stay apart.
    """
    module = _module_of(what, name)
    if what == "module":
        _MODULES.add(name)
        out: list[str] = []
        for line in lines:
            if out and _UNDERLINE.match(line) and out[-1].strip() and not _UNDERLINE.match(out[-1]):
                title = out.pop().strip()
                out += [f".. rubric:: {title}", ""]
                continue
            out.append(line)
        lines[:] = out
        lines[:] = [_CITATION.sub(lambda m: f"{m.group(1)}[{_label(module, m.group(2))}]", x)
                    for x in lines]
    # A function's own numbered citations are numpydoc's to rename; the others point
    # at the module docstring's.
    own = {m.group(2) for x in lines if (m := _CITATION.match(x))}

    def relabel(m: re.Match) -> str:
        return m.group(0) if m.group(1) in own else f"[{_label(module, m.group(1))}]_"

    lines[:] = [_CITE_REF.sub(relabel, x) for x in lines]


def _source_read(app: Any, docname: str, source: list[str]) -> None:
    if MARKER in source[0]:
        source[0] = source[0].replace(MARKER, api_markdown())


def setup(app: Any) -> dict[str, Any]:
    app.connect("source-read", _source_read)
    # before numpydoc (priority 500), which renames the citations it finds
    app.connect("autodoc-process-docstring", _process_docstring, priority=400)
    return {"version": "1", "parallel_read_safe": True, "parallel_write_safe": True}
