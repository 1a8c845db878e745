"""Bundled example data: invented feeds of invented places."""

from importlib.resources import files
from pathlib import Path


def example_path(name: str) -> Path:
    """Path of a bundled example file."""
    return Path(str(files(__name__) / name))
