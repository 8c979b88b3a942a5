"""Regime-aware tracking of factor risk premia, with honest uncertainty."""

__version__ = "0.1.0"
