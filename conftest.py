"""pytest configuration shared by the tests and the doctests (see ``[tool.pytest.ini_options]``).

Being in the repository root, this file also puts the checkout first on ``sys.path``, so that the
tests, the docstrings collected by ``--doctest-modules`` and the Markdown pages all use the same
``dihedra`` (the one beside them), installed or not.
"""

# docs/ holds Markdown pages whose >>> examples run as doctests (--doctest-glob=*.md); the Sphinx
# configuration, its extension and the generated API stubs are not test modules.
collect_ignore = ["docs/conf.py", "docs/_ext", "docs/api", "docs/_build"]
