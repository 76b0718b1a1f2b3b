"""The tool's version, in a module of its own so any module can import it without the package."""

__version__ = "0.1.0"
