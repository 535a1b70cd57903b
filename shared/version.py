"""The engine's version, recorded with every stored fit.

0.1.1: points that lie on the fitted curve to rounding have no suspect point.
"""

ENGINE_VERSION = "0.1.1"
