"""Regime-aware tracking of factor risk premia, with honest uncertainty."""

import os as _os

__version__ = "0.1.0"

# The repository keeps queries/ and seed_db/ at its top level; an install maps them into
# this package as tracker.queries and tracker.seed_db (pyproject.toml, package-dir). When
# the package is imported straight from a source checkout (e.g. `python -m pytest` or
# `python -m tracker` run from the repository root), let the same names resolve to those
# top-level folders.
_here = _os.path.dirname(_os.path.abspath(__file__))
_root = _os.path.dirname(_here)
if not _os.path.isdir(_os.path.join(_here, "queries")) and all(
    _os.path.isfile(_os.path.join(_root, name, "__init__.py")) for name in ("queries", "seed_db")
):
    __path__.append(_root)  # noqa: F821 - __path__ is defined for packages
