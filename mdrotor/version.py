"""The package version, once: the face, the result files and pyproject.toml (dynamic version) read it here."""

__version__ = "0.1.0"
