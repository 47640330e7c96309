"""Quietlayer dashboard and command line (no numerics here: see quietlayer.engine)."""

CAUTION = ("Quietlayer estimates the numerical reflection of a simulation boundary. It certifies no "
           "RF-exposure, EMC or safety compliance; defer to local codes and licensed practice.")
