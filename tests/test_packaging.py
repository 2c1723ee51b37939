"""The installed package holds every subpackage of the source tree.

`pip install .` (the README's set-up) installs only the packages listed in
pyproject.toml; a new subpackage missing there works from the source tree and
fails only once installed (it happened with ``roomcorr.rooms``).
"""

from __future__ import annotations

import tomllib
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def test_every_subpackage_is_listed_in_pyproject():
    # Outside reference: setuptools installs exactly [tool.setuptools] packages.
    config = tomllib.loads((REPO / "pyproject.toml").read_text())
    listed = set(config["tool"]["setuptools"]["packages"])
    source = {
        ".".join(p.parent.relative_to(REPO).parts)
        for p in (REPO / "roomcorr").rglob("__init__.py")
        if "__pycache__" not in p.parts
    }
    assert source - listed == set(), "add these to [tool.setuptools] packages"
    assert "roomcorr.presets" in listed  # installed from presets/ (package-dir)
