"""The version of curate (one place; the package metadata says the same)."""

from __future__ import annotations

__version__ = "0.1.0"
