"""Fixed files of passivefit (window icon, palette, report texts), read with importlib.resources.

The folder is the top-level ``resources/`` of the source tree, installed as this package.
"""
