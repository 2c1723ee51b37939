"""The documentation: it builds with zero warnings, its command reference matches the
parser, and the README stays short and leads a newcomer to measuring quickly.

The build runs Sphinx in a subprocess (as a contributor would) with ``-W``: any warning
(a broken link, a skipped heading level, a malformed docstring) fails it.
"""

from __future__ import annotations

import argparse
import html
import os
import re
import subprocess
import sys
from html.parser import HTMLParser
from pathlib import Path

import pytest

from roomcorr.cli import build_parser

ROOT = Path(__file__).resolve().parent.parent
DOCS = ROOT / "docs"
README = ROOT / "README.md"
# The README's test command: .ci/run runs it verbatim.
TEST_COMMAND = (
    'python3 -m venv .venv && . .venv/bin/activate && pip install ".[test]" && python -m pytest'
)
MEASURE_PAGE = "docs/tutorials/measure-your-room.md"


@pytest.fixture(scope="module")
def built_site(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str]:
    """Build the site once into a temporary folder; return it and Sphinx's output."""
    out = tmp_path_factory.mktemp("docs-html")
    doctrees = tmp_path_factory.mktemp("docs-doctrees")
    env = dict(os.environ, MPLBACKEND="Agg")
    env["PYTHONPATH"] = str(ROOT) + os.pathsep + env.get("PYTHONPATH", "")
    done = subprocess.run(
        [sys.executable, "-m", "sphinx", "-W", "--keep-going", "-E", "-q", "-b", "html",
         "-d", str(doctrees), str(DOCS), str(out)],
        cwd=ROOT, env=env, capture_output=True, text=True, timeout=900,
    )
    log = done.stdout + done.stderr
    assert done.returncode == 0, f"the documentation does not build with -W:\n{log}"
    return out, log


def test_docs_build_without_warnings(built_site: tuple[Path, str]) -> None:
    out, log = built_site
    # -W already fails the build on a warning; this also catches output that -W lets pass.
    assert not re.search(r"WARNING|ERROR|CRITICAL", log), log
    for page in ("index", "tutorials/measure-your-room", "reference/cli", "reference/api",
                 "reference/api/roomcorr.design", "reference/api/roomcorr.app",
                 "reference/settings", "explanation/the-report"):
        assert (out / f"{page}.html").is_file(), page
    # The pictures were drawn and copied into the site.
    images = {p.name for p in (out / "_images").glob("*.png")}
    assert {"setup.png", "positions.png", "left-room.png", "left-filter.png"} <= images


class _Sections(HTMLParser):
    """Text of the built command reference, split at each subcommand's ``cmd-NAME`` anchor."""

    def __init__(self) -> None:
        super().__init__()
        self.current = ""
        self.text: dict[str, list[str]] = {"": []}

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        ident = dict(attrs).get("id") or ""
        if ident.startswith("cmd-"):
            self.current = ident[len("cmd-"):]
            self.text.setdefault(self.current, [])

    def handle_data(self, data: str) -> None:
        self.text[self.current].append(data)


def _subparsers(parser: argparse.ArgumentParser) -> dict[str, argparse.ArgumentParser]:
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            return dict(action.choices)
    raise AssertionError("the CLI has no subcommands")


def missing_from_reference(parser: argparse.ArgumentParser, page_html: str) -> list[str]:
    """Every subcommand, option and positional argument of ``parser`` not in the page.

    An option counts only in its own command's section (from its ``cmd-NAME`` anchor
    to the next), so ``--out`` of one command cannot stand in for another's.
    """
    sections = _Sections()
    sections.feed(page_html)
    text = {name: html.unescape(" ".join(parts)) for name, parts in sections.text.items()}
    missing = []
    for name, sub in _subparsers(parser).items():
        if name not in text or f"roomcorr {name}" not in text[name]:
            missing.append(f"roomcorr {name}: no section")
            continue
        for action in sub._actions:
            if action.help == argparse.SUPPRESS:
                continue
            for option in action.option_strings:
                if not re.search(rf"(?<![\w-]){re.escape(option)}(?![\w-])", text[name]):
                    missing.append(f"roomcorr {name} {option}")
            if not action.option_strings:  # a positional argument: its metavar is shown
                shown = action.metavar if isinstance(action.metavar, str) else action.dest
                if shown not in text[name]:
                    missing.append(f"roomcorr {name} {shown}")
    for action in parser._actions:
        for option in action.option_strings:
            if option not in text[""]:
                missing.append(f"roomcorr {option}")
    return missing


def test_every_command_and_option_is_in_the_reference(built_site: tuple[Path, str]) -> None:
    out, _log = built_site
    page = (out / "reference" / "cli.html").read_text(encoding="utf-8")
    parser = build_parser()
    assert len(_subparsers(parser)) >= 11  # demo, design, report, devices, measure, ... ui
    missing = missing_from_reference(parser, page)
    assert not missing, "not in the built command reference: " + ", ".join(missing)


def test_the_comparison_finds_what_the_page_lacks(built_site: tuple[Path, str]) -> None:
    """A parser that grew after the build is caught: the comparison can fail."""
    out, _log = built_site
    page = (out / "reference" / "cli.html").read_text(encoding="utf-8")
    parser = build_parser()
    commands = _subparsers(parser)
    commands["design"].add_argument("--not-documented-yet", action="store_true")
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    sub.add_parser("newer-command", help="added after the build")
    assert missing_from_reference(parser, page) == [
        "roomcorr design --not-documented-yet",
        "roomcorr newer-command: no section",
    ]


def test_reference_lists_options_of_a_parser_it_has_never_seen() -> None:
    """The generator takes any parser: a new command or option needs no edit of the docs."""
    sys.path.insert(0, str(DOCS / "_ext"))
    try:
        import roomcorr_cli
    finally:
        sys.path.remove(str(DOCS / "_ext"))
    parser = argparse.ArgumentParser(prog="roomcorr")
    sub = parser.add_subparsers()
    p = sub.add_parser("newcmd", help="a command added later")
    p.add_argument("--level-db", type=float, default=-3.0, metavar="DB", help="a | level")
    p.add_argument("--mode", choices=["a", "b"], help="mode")
    text = roomcorr_cli.cli_markdown(parser)
    assert "## `roomcorr newcmd`" in text
    assert "`--level-db DB`" in text and "(default: -3.0)" in text
    assert "a \\| level" in text  # Markdown table and markup characters are escaped
    assert "`--mode {a,b}`" in text


def test_every_page_has_one_title() -> None:
    """One ``# Title`` per page, first: the glob toctrees list pages by it."""
    pages = [p for p in DOCS.rglob("*.md")
             if not {"_build", "_generated", "api"} & set(p.relative_to(DOCS).parts[:-1])]
    assert len(pages) >= 20
    for page in pages:
        lines = page.read_text(encoding="utf-8").splitlines()
        fence = False
        titles = []
        for line in lines:
            if line.startswith(("```", "~~~")):
                fence = not fence
            elif not fence and line.startswith("# "):
                titles.append(line)
        assert lines[0].startswith("# ") and len(titles) == 1, page.relative_to(ROOT)


def _words_before(text: str, marker: str) -> int:
    head = text[: text.index(marker)]
    head = re.sub(r"\]\([^)]*\)", "]", head)  # a link's address is not read
    return len(re.findall(r"[A-Za-z0-9][\w'.,/-]*", head))


def test_readme_is_short_and_reaches_measuring_quickly() -> None:
    text = README.read_text(encoding="utf-8")
    lines = text.splitlines()
    assert len(lines) <= 150, f"README.md has {len(lines)} lines (at most about 150)"
    assert lines[0] == "# roomcorr"
    # A newcomer reads under 300 words before the link to "how to measure my room".
    words = _words_before(text, f"]({MEASURE_PAGE})")
    assert words < 300, f"{words} words before the measuring tutorial's link"
    # The safety cautions stay prominent: before the quick start.
    safety = text.index("## Safety first")
    assert safety < text.index("## Quick start")
    for caution in ("Start low", "Protect your hearing", "excursion", "regulations on noise"):
        assert caution in text[safety:text.index("## Quick start")], caution


def test_readme_commands_match_ci() -> None:
    text = README.read_text(encoding="utf-8")
    assert TEST_COMMAND in text
    assert TEST_COMMAND in (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    assert "pip install . && roomcorr demo" in text


def test_readme_and_developers_links_resolve() -> None:
    """Relative links work on a code host: every one names a file of the repository."""
    for doc in (README, ROOT / "DEVELOPERS.md"):
        targets = re.findall(r"\]\(([^)#\s]+)(?:#[^)]*)?\)", doc.read_text(encoding="utf-8"))
        local = [t for t in targets if not re.match(r"[a-z]+:", t)]
        assert local, doc.name
        broken = [t for t in local if not (doc.parent / t).exists()]
        assert not broken, f"{doc.name}: links to missing files {broken}"
