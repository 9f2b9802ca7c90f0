"""The package version, recorded in converted files."""

__version__ = "0.1.0"
