"""Sphinx extension: the Python API reference, one section per public module.

At build time one page per subpackage is written into ``reference/api/`` (not in
git), with an ``automodule`` block for every module whose name does not start with an
underscore; the page holding ``<!-- roomcorr-api-reference -->`` gets a toctree of
them. New modules and subpackages join the reference without an edit here.
"""

from __future__ import annotations

import hashlib
import importlib
import pkgutil
import re
import sys
from pathlib import Path
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


def _groups() -> dict[str, list[str]]:
    """Public modules by page: one page per subpackage, one for the top-level modules."""
    groups: dict[str, list[str]] = {}
    for name in public_modules():
        parts = name.split(".")
        module = importlib.import_module(name)
        if len(parts) == 1 or (len(parts) == 2 and not hasattr(module, "__path__")):
            groups.setdefault("roomcorr", []).append(name)
        else:
            groups.setdefault(".".join(parts[:2]), []).append(name)
    return groups


def api_pages() -> dict[str, str]:
    """MyST Markdown of every API page, by file name (``roomcorr.design.md``, ...)."""
    pages = {}
    for group, names in _groups().items():
        title = "Top-level modules" if group == "roomcorr" else f"`{group}`"
        lines = [f"# {title}", ""]
        for name in names:
            if name != group:
                lines += [f"## `{name}`", ""]
            lines += ["```{eval-rst}", f".. automodule:: {name}", "```", ""]
        pages[f"{group}.md"] = "\n".join(lines)
    return pages


def api_markdown() -> str:
    """The API index: one line per page, in a toctree."""
    lines = ["", "```{toctree}", ":maxdepth: 1", ""]
    # the top-level modules first, then the subpackages in the order data flows through them
    order = ["roomcorr", "roomcorr.measure", "roomcorr.analysis", "roomcorr.design",
             "roomcorr.deliver", "roomcorr.report", "roomcorr.rooms", "roomcorr.app",
             "roomcorr.ui", "roomcorr.evaluation"]
    names = sorted((name[:-3] for name in api_pages()),
                   key=lambda n: (order.index(n) if n in order else len(order), n))
    lines += [f"api/{name}" for name in names]
    lines += ["```", ""]
    return "\n".join(lines)


def _write_pages(app: Any) -> None:
    """Write the API pages into ``reference/api/`` (not in git) before the sources are read."""
    folder = Path(app.srcdir) / "reference" / "api"
    folder.mkdir(parents=True, exist_ok=True)
    pages = api_pages()
    for old in folder.glob("*.md"):
        if old.name not in pages:
            old.unlink()
    for name, text in pages.items():
        path = folder / name
        if not path.is_file() or path.read_text(encoding="utf-8") != text:
            path.write_text(text, encoding="utf-8")


_BACKTICKS = re.compile(r"(``.*?``|`[^`]*`)")


def _escape_bars(lines: list[str]) -> list[str]:
    """Escape ``|`` in prose, where docstrings mean an absolute value (``|h|``).

    reStructuredText would read ``|h|`` as a substitution and fail the build. Literal
    text (between backticks, in ``::`` blocks) and table or line-block lines (starting
    with ``| ``, ``+-`` or ``+=``) are left alone.
    """
    out: list[str] = []
    literal_indent: int | None = None
    for line in lines:
        stripped = line.strip()
        indent = len(line) - len(line.lstrip())
        if literal_indent is not None:
            if stripped and indent <= literal_indent:
                literal_indent = None
            else:
                out.append(line)
                continue
        if "|" in line and not (stripped == "|" or stripped.startswith(("| ", "+-", "+="))):
            parts = _BACKTICKS.split(line)
            for k in range(0, len(parts), 2):
                parts[k] = re.sub(r"(?<!\\)\|", r"\\|", parts[k])
            line = "".join(parts)
        out.append(line)
        if stripped.endswith("::"):
            literal_indent = indent
    return out


_UNDERLINE = re.compile(r"^\s*([-=~^])\1{2,}\s*$")
_CITATION = re.compile(r"^(\s*\.\. )\[(\d+)\]")
_CITE_REF = re.compile(r"\[(\d+)\]_")


def _label(module: str, number: str) -> str:
    """numpydoc's own form of a citation label (``R`` + hash + ``-1``), per module.

    numpydoc shows such labels as ``[1]`` again in the built page.
    """
    digest = hashlib.sha256(("module:" + module).encode()).hexdigest()[:HASH_LEN]
    return f"R{digest}-{number}"


def _module_of(what: str, name: str, obj: Any) -> str:
    """The module whose docstring holds the citations an object's ``[1]_`` points at."""
    if what == "module":
        return name
    defined_in = getattr(obj, "__module__", None)
    if isinstance(defined_in, str) and defined_in.startswith("roomcorr"):
        return defined_in
    parts = name.split(".")
    for k in range(len(parts) - 1, 0, -1):
        candidate = ".".join(parts[:k])
        if candidate in sys.modules:
            return candidate
    return name


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
    module = _module_of(what, name, obj)
    if what == "module":
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
    lines[:] = _escape_bars(lines)


def _source_read(app: Any, docname: str, source: list[str]) -> None:
    if MARKER in source[0]:
        source[0] = source[0].replace(MARKER, api_markdown())


def setup(app: Any) -> dict[str, Any]:
    app.connect("builder-inited", _write_pages)
    app.connect("source-read", _source_read)
    # before numpydoc (priority 500), which renames the citations it finds
    app.connect("autodoc-process-docstring", _process_docstring, priority=400)
    return {"version": "1", "parallel_read_safe": True, "parallel_write_safe": True}
