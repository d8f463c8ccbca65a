"""Gradfence user interfaces: the command line (and the desktop app)."""
