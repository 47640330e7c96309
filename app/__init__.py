"""Quietlayer dashboard and command line (no numerics here: see quietlayer.engine)."""
