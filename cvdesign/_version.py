"""The version of cvdesign, in one place (read by pyproject.toml and every module)."""

__version__ = "0.1.0"
