"""Shared pytest configuration.

Keep fixtures that one module needs inside that module; put only truly
shared helpers here.
"""

import os

import matplotlib

matplotlib.use("Agg")
os.environ.setdefault("MPLBACKEND", "Agg")
