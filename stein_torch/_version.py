"""The package version (read by pyproject.toml and the InferenceData attrs)."""

__all__ = ["__version__"]

__version__ = "0.2.0"
