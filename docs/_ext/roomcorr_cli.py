"""Sphinx extension: the command-line reference, generated from roomcorr's own parser.

A Markdown page that holds the line ``<!-- roomcorr-cli-reference -->`` gets, in its
place, one section per subcommand of :func:`roomcorr.cli.build_parser`: its usage line,
its description and every option with its help text and default. Nothing is written by
hand, so the reference cannot drift from the parser; ``tests/test_docs.py`` checks the
built page against the parser.
"""

from __future__ import annotations

import argparse
import os
import re
import textwrap
from typing import Any

MARKER = "<!-- roomcorr-cli-reference -->"
_SPECIAL = re.compile(r"([\\`*_\[\]<>|#{}])")


def _text(value: str) -> str:
    """Escape text for MyST Markdown (help strings are plain text, not markup)."""
    return _SPECIAL.sub(r"\\\1", " ".join(value.split()))


def _subcommands(parser: argparse.ArgumentParser) -> list[tuple[str, str, argparse.ArgumentParser]]:
    """``(name, one-line help, parser)`` of every subcommand, in the parser's order."""
    out = []
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            helps = {a.dest: a.help or "" for a in action._choices_actions}
            seen: set[int] = set()
            for name, sub in action.choices.items():
                if id(sub) in seen:  # an alias of a command already listed
                    continue
                seen.add(id(sub))
                out.append((name, helps.get(name, ""), sub))
    return out


def _invocation(action: argparse.Action) -> str:
    """How an option is written: ``--max-boost DB``, ``-h, --help`` or ``IR``."""
    if not action.option_strings:
        return action.metavar if isinstance(action.metavar, str) else action.dest
    if action.nargs == 0:
        return ", ".join(action.option_strings)
    formatter = argparse.HelpFormatter("roomcorr")
    args = formatter._format_args(action, action.dest.upper())
    return ", ".join(f"{opt} {args}" for opt in action.option_strings)


def _help(parser: argparse.ArgumentParser, action: argparse.Action) -> str:
    formatter = parser._get_formatter()
    text = formatter._expand_help(action) if action.help else ""
    if (
        action.default not in (None, False, argparse.SUPPRESS)
        and action.nargs != 0
        and "%(default)" not in (action.help or "")
        and "default" not in text.lower()
        and str(action.default) not in text
    ):
        text = f"{text} (default: {action.default})" if text else f"default: {action.default}"
    if action.choices and not isinstance(action, argparse._SubParsersAction) and not all(
        str(c) in text for c in action.choices
    ):
        text += " (one of: " + ", ".join(str(c) for c in action.choices) + ")"
    return text


def _actions_markdown(parser: argparse.ArgumentParser) -> list[str]:
    lines: list[str] = []
    for group in parser._action_groups:
        actions = [
            a
            for a in group._group_actions
            if a.help != argparse.SUPPRESS and not isinstance(a, argparse._SubParsersAction)
        ]
        if not actions:
            continue
        title = group.title or 'options'
        lines += ["", f"**{_text(title[:1].upper() + title[1:])}**", ""]
        if group.description:
            lines += [_text(group.description), ""]
        for action in actions:
            lines.append(f"`{_invocation(action)}`")
            lines.append(f": {_text(_help(parser, action)) or '(no description)'}")
            lines.append("")
    return lines


def cli_markdown(parser: argparse.ArgumentParser) -> str:
    """The whole command reference of ``parser`` as MyST Markdown.

    Parameters
    ----------
    parser : argparse.ArgumentParser
        The top-level parser, with subcommands.

    Returns
    -------
    str
        One ``##`` section per subcommand (usage, description, options).
    """
    saved = os.environ.get("COLUMNS")
    os.environ["COLUMNS"] = "88"  # argparse wraps usage lines to this width
    try:
        return _cli_markdown(parser)
    finally:
        if saved is None:
            del os.environ["COLUMNS"]
        else:
            os.environ["COLUMNS"] = saved


def _cli_markdown(parser: argparse.ArgumentParser) -> str:
    prog = parser.prog
    lines = ["", "## Commands at a glance", ""]
    subs = _subcommands(parser)
    for name, short, _sub in subs:
        lines.append(f"- [`{prog} {name}`](#cmd-{name}): {_text(short)}")
    lines += ["", "Options for every command:", ""]
    lines += _actions_markdown(parser)
    for name, short, sub in subs:
        usage = sub.format_usage().strip()
        if usage.lower().startswith("usage:"):
            usage = usage[len("usage:") :].lstrip(" ")
            usage = textwrap.dedent("       " + usage)
        lines += ["", f"({'cmd-' + name})=", f"## `{prog} {name}`", ""]
        lines += ["```text", usage, "```", ""]
        lines.append(_text(sub.description or short))
        lines += _actions_markdown(sub)
    return "\n".join(lines) + "\n"


def _source_read(app: Any, docname: str, source: list[str]) -> None:
    if MARKER not in source[0]:
        return
    from roomcorr.cli import build_parser

    source[0] = source[0].replace(MARKER, cli_markdown(build_parser()))




SETTINGS_MARKER = "<!-- roomcorr-settings-keys -->"


def _default_text(field: Any) -> str:
    import dataclasses

    if field.default is not dataclasses.MISSING:
        value = field.default
    elif field.default_factory is not dataclasses.MISSING:
        value = field.default_factory()
    else:
        return "(required)"
    if value is None:
        return "automatic / none"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, tuple):
        value = list(value)
    if isinstance(value, str):
        return f'"{value}"'
    return str(value).replace("'", '"')


def _design_descriptions(cls: type) -> dict[str, str]:
    """Attribute descriptions from a numpydoc ``Attributes`` section (``a, b : type``)."""
    from numpydoc.docscrape import ClassDoc

    out: dict[str, str] = {}
    for item in ClassDoc(cls, config={"show_class_members": False})["Attributes"]:
        for name in item.name.split(","):
            out[name.strip()] = " ".join(item.desc)
    return out


def _comment_descriptions(cls: type) -> dict[str, str]:
    """Descriptions from the ``name: type = value  # comment`` lines of a dataclass."""
    import inspect

    out: dict[str, str] = {}
    pattern = re.compile(r"^\s+(\w+)\s*:[^=]+=[^#]*#\s*(.+)$")
    for line in inspect.getsource(cls).splitlines():
        m = pattern.match(line)
        if m:
            out[m.group(1)] = m.group(2).strip()
    return out


def _rst_inline(text: str) -> str:
    """A docstring sentence as Markdown: ``x`` and :role:`x` become code, ``|`` is escaped."""
    text = re.sub(r":\w+:`~?([^`]+)`", r"``\1``", " ".join(text.split()))
    parts = text.split("``")
    for k in range(0, len(parts), 2):
        parts[k] = re.sub(r"([\\*_\[\]<>|])", r"\\\1", parts[k])
    for k in range(1, len(parts), 2):
        parts[k] = "`" + parts[k].replace("|", "\\|") + "`"
    return "".join(parts)


def settings_markdown() -> str:
    """Tables of every ``[design]`` and ``[measure]`` key with its default.

    The keys and defaults are read from :class:`roomcorr.settings.DesignSettings` and
    :class:`roomcorr.measure.settings.MeasureSettings`, the descriptions from their
    docstring and source comments.
    """
    import dataclasses

    from roomcorr.measure.settings import MeasureSettings
    from roomcorr.settings import DesignSettings

    lines: list[str] = []
    for table, cls, describe in (
        ("design", DesignSettings, _design_descriptions),
        ("measure", MeasureSettings, _comment_descriptions),
    ):
        texts = describe(cls)
        lines += ["", f"### `[{table}]`", "", "| key | default | meaning |", "| --- | --- | --- |"]
        for field in dataclasses.fields(cls):
            if field.name.startswith("_"):
                continue
            meaning = _rst_inline(texts.get(field.name, ""))
            lines.append(f"| `{field.name}` | `{_default_text(field)}` | {meaning} |")
    return "\n".join(lines) + "\n"


def _settings_source_read(app: Any, docname: str, source: list[str]) -> None:
    if SETTINGS_MARKER in source[0]:
        source[0] = source[0].replace(SETTINGS_MARKER, settings_markdown())


def _setup_settings(app: Any) -> None:
    app.connect("source-read", _settings_source_read)


def _always_outdated(app: Any, env: Any, added: set, changed: set, removed: set) -> list[str]:
    """Pages with a generated part are read again on every build, also incremental ones:
    their Markdown does not change when the parser or the settings do."""
    return [name for name in ("reference/cli", "reference/settings", "reference/api")
            if name in env.found_docs]


def setup(app: Any) -> dict[str, Any]:
    app.connect("source-read", _source_read)
    app.connect("env-get-outdated", _always_outdated)
    _setup_settings(app)
    return {"version": "1", "parallel_read_safe": True, "parallel_write_safe": True}
