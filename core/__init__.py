"""Gradfence computation: scenarios, data, models, clipping, engine, results. No Qt here."""

__version__ = "0.1.0"
