"""Gradfence computation: scenarios, data, models, clipping, engine, results. No Qt here."""

__version__ = "0.2.0"
