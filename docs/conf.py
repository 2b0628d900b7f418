"""Sphinx configuration of dihedra's documentation.

Build (from the repository root, with ``pip install ".[docs]"``)::

    sphinx-build -W --keep-going -b html docs /tmp/docs-html

The build needs no network: there are no intersphinx mappings. The API reference is generated
from the package at build time (``dihedra.__all__`` and the subpackages), so new public names
appear without editing these files.
"""

import os
import sys

# the checkout's package first, so that the pages document the source beside them
sys.path.insert(0, os.path.abspath(".."))

import dihedra  # noqa: E402

project = "dihedra"
author = "the dihedra developers"
copyright = "the dihedra developers"
version = release = dihedra.__version__

extensions = [
    "sphinx.ext.autodoc",
    "sphinx.ext.autosummary",
    "sphinx.ext.mathjax",
    "numpydoc",
    "myst_parser",
    "_ext.dihedra_api",
]
sys.path.insert(0, os.path.abspath("."))

source_suffix = {".rst": "restructuredtext", ".md": "markdown"}
root_doc = "index"
templates_path = ["_templates"]
exclude_patterns = ["_build", "Thumbs.db", ".DS_Store"]

# Markdown pages are included as they are; headings get anchors for links within a page
myst_heading_anchors = 3
myst_enable_extensions = ["dollarmath"]

# API reference: one page per module, stubs generated under api/ at build time (not committed)
autosummary_generate = True
autosummary_ignore_module_all = False
autodoc_default_options = {"members": True, "member-order": "bysource", "show-inheritance": True}
autodoc_typehints = "none"
autodoc_mock_imports = []

# numpydoc renders the docstrings; class member tables come from autodoc instead
numpydoc_show_class_members = False
numpydoc_class_members_toctree = False
numpydoc_xref_param_type = False

html_theme = "alabaster"
html_title = f"dihedra {release}"
html_theme_options = {
    "description": "Conformer-aware torsion analysis of molecular-dynamics trajectories",
    "page_width": "1240px",
    "sidebar_width": "240px",
}
html_static_path = []
