"""Sphinx configuration of roomcorr's documentation.

Build it with ``python -m sphinx -W -b html docs docs/_build/html`` from the
repository's top folder (``-W``: every warning is an error, as in the tests).
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

DOCS = Path(__file__).resolve().parent
ROOT = DOCS.parent
sys.path.insert(0, str(ROOT))  # roomcorr from this checkout, installed or not
sys.path.insert(0, str(DOCS / "_ext"))
sys.path.insert(0, str(DOCS / "figures"))

from roomcorr import __version__  # noqa: E402

project = "roomcorr"
author = "the roomcorr contributors"
copyright = "the roomcorr contributors"  # noqa: A001
release = __version__
version = __version__

extensions = [
    "myst_parser",
    "sphinx.ext.autodoc",
    "numpydoc",
    "roomcorr_cli",
    "roomcorr_api",
    "docs_figures",
]

source_suffix = {".md": "markdown", ".rst": "restructuredtext"}
root_doc = "index"
exclude_patterns = ["_build", "Thumbs.db", ".DS_Store", "**/README.md"]
templates_path: list[str] = []

# MyST: ordinary Markdown builds as is; these add what the pages use.
myst_enable_extensions = ["colon_fence", "deflist", "dollarmath", "attrs_inline"]
# `[text](#a-heading)` links to headings of up to level 3 work as on a code host.
myst_heading_anchors = 3

# The Python API: autodoc reads the docstrings, numpydoc their sections.
# Every object once, in the module that defines it (a package's __all__ re-exports are
# not documented again).
autodoc_default_options = {
    "members": True,
    "member-order": "bysource",
    "ignore-module-all": True,
}
autodoc_typehints = "none"  # the numpydoc sections carry the types
autodoc_mock_imports = ["sounddevice", "jack", "uvicorn"]
numpydoc_show_class_members = False
# numpydoc loads autosummary; we do not use it, and its scan of the pages at start-up would
# read the API pages before docs/_ext/roomcorr_api.py has written them afresh.
autosummary_generate = False
numpydoc_class_members_toctree = False
numpydoc_xref_param_type = False

html_theme = "furo"
html_title = f"roomcorr {version}"
html_static_path: list[str] = []
html_show_sourcelink = False

nitpicky = False
os.environ.setdefault("MPLBACKEND", "Agg")

# numpydoc lists a docstring's References as citations even where its text does not
# cite them with [1]_; that is the numpydoc style, not a broken link.
suppress_warnings = ["ref.citation"]
# numpydoc renames a docstring's numbered citations ([1]) to keep them apart; the module
# citations get their module's label from docs/_ext/roomcorr_api.py instead.
numpydoc_citation_re = r"\d+"
# Options such as --out must stay two hyphens, never an en dash.
smartquotes = False
