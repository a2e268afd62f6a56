"""hemostream: a hemodynamic monitoring stream processor."""
__version__ = "0.1.0"
