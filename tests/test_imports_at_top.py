"""Imports sit at the top of modules, so each module shows what it depends on.

DESIGN.md ("Conventions"): start-up speed comes from the CLI importing a command's
module only when that command runs; inside the package modules import at the top.
The exceptions are listed here one by one (module, function, imported module), so a
new import inside a function fails this test until it moves to the top or joins the
list with its reason. Imports are read with :mod:`ast` (the Python grammar's own
parser, not ours).
"""

from __future__ import annotations

import ast
import os
import subprocess
import sys
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "roomcorr"

#: Modules whose function-level imports are all allowed: the command dispatch of the CLI
#: imports a command's module only when that command runs (start-up time).
LAZY_MODULES = {"roomcorr.cli"}

#: Every other import inside a function: (module, function, imported module).
ALLOWED = {
    # ``import roomcorr`` stays light (the CLI's start-up): the four public names are
    # loaded on first use (PEP 562 module __getattr__)
    ("roomcorr", "__getattr__", "roomcorr.pipeline"),
    ("roomcorr", "__getattr__", "roomcorr.audio_io"),
    ("roomcorr", "__getattr__", "roomcorr.deliver.export"),
    ("roomcorr", "__getattr__", "roomcorr.settings"),
    # the sound-card library needs PortAudio at import time: one lazy import, in one place
    ("roomcorr.measure.capture", "_sd", "sounddevice"),
    # platform modules: fcntl exists on POSIX only, msvcrt on Windows only
    ("roomcorr.rooms.lock", "_try_lock", "fcntl"),
    ("roomcorr.rooms.lock", "_try_lock", "msvcrt"),
    ("roomcorr.rooms.lock", "_unlock", "fcntl"),
    ("roomcorr.rooms.lock", "_unlock", "msvcrt"),
    ("roomcorr.rooms.lock", "is_locked", "fcntl"),
}


def _module_name(path: Path) -> str:
    parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def function_level_imports(package: Path = PACKAGE) -> set[tuple[str, str, str]]:
    """(module, innermost enclosing function, imported module) of every import that
    sits inside a function anywhere under ``package``."""
    found: set[tuple[str, str, str]] = set()

    def visit(node: ast.AST, module: str, func: str | None) -> None:
        for child in ast.iter_child_nodes(node):
            if isinstance(child, ast.FunctionDef | ast.AsyncFunctionDef):
                visit(child, module, child.name)
            elif isinstance(child, ast.Import | ast.ImportFrom) and func is not None:
                if isinstance(child, ast.ImportFrom):
                    names = ["." * child.level + (child.module or "")]
                else:
                    names = [a.name for a in child.names]
                found.update((module, func, n) for n in names)
            else:
                visit(child, module, func)

    for path in sorted(package.rglob("*.py")):
        name = _module_name(path) if package == PACKAGE else path.stem
        visit(ast.parse(path.read_text(encoding="utf-8")), name, None)
    return found


def test_the_check_sees_an_import_inside_a_function(tmp_path):
    # One at the top, one in a method, one in a nested function: the last two are found.
    (tmp_path / "fake.py").write_text(
        "import os\n"
        "class A:\n"
        "    def m(self):\n"
        "        import json\n"
        "def f():\n"
        "    def g():\n"
        "        from scipy import signal\n"
        "    return g\n"
    )
    assert function_level_imports(tmp_path) == {("fake", "m", "json"), ("fake", "g", "scipy")}


def test_imports_sit_at_the_top_of_modules():
    found = {f for f in function_level_imports() if f[0] not in LAZY_MODULES}
    new = sorted(found - ALLOWED)
    assert not new, (
        "imports inside functions (DESIGN.md, Conventions: move them to the top of the module, "
        "or list them in ALLOWED with the reason): "
        + ", ".join(f"{m}.{f}: {i}" for m, f, i in new)
    )


def test_allowed_exceptions_are_still_real():
    # A move that removes one of them must also remove it from ALLOWED.
    stale = sorted(ALLOWED - function_level_imports())
    assert not stale, "no longer imported inside a function, remove from ALLOWED: " + ", ".join(
        f"{m}.{f}: {i}" for m, f, i in stale
    )


def test_the_cli_still_imports_a_command_module_only_when_it_runs():
    # The CLI's top imports stay few: the standard library and roomcorr.errors.
    tree = ast.parse((PACKAGE / "cli.py").read_text(encoding="utf-8"))
    top = set()
    for node in tree.body:
        if isinstance(node, ast.Import):
            top.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            top.add(node.module or "")
    assert {m for m in top if m.startswith("roomcorr")} == {"roomcorr.errors"}


def test_the_command_line_parser_loads_no_numerical_library():
    # `roomcorr --help` builds every subcommand's parser; building them must not load
    # numpy, scipy, matplotlib or soundfile (they come with the command that runs).
    # Read from Python's own sys.modules in a fresh interpreter.
    code = (
        "import sys\n"
        "from roomcorr import cli\n"
        "cli.build_parser()\n"
        "heavy = {'numpy', 'scipy', 'matplotlib', 'soundfile'}\n"
        "print(sorted(m for m in sys.modules if m.split('.')[0] in heavy))\n"
    )
    env = {**os.environ, "PYTHONPATH": str(PACKAGE.parent)}
    run = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, env=env, timeout=120
    )
    assert run.returncode == 0, run.stderr
    assert run.stdout.strip() == "[]"
