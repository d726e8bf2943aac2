"""passivefit: passive membrane properties from whole-cell current-clamp recordings."""

__version__ = "0.1.0"
