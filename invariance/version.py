"""The package version (one place; the package, the CLI and results.json read it)."""

__version__ = "0.1.0"
