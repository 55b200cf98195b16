"""How often the cyclic garbage collector runs in a run, and in the analysis of its layout.

A capture keeps a record per shape drawn and an analysis holds millions of shapely
geometries. At Python's default pace (a collection every 700 new objects, every
hundredth of them a full pass over every live object) the collector took 0.7-0.9 s of
a 1M-shape script under capture and 0.4-1.4 s of its check (tests/bench/bench_gc.py).
A collection every 100,000 new objects still collects every cycle, and costs nothing
that can be measured. Standard library only: this runs in the user's interpreter.
"""

from __future__ import annotations

import gc

THRESHOLDS = (100_000, 10, 10)


def pace_for_layouts():
    """Collect every THRESHOLDS[0] new objects instead of every 700 (the full passes follow)."""
    gc.set_threshold(*THRESHOLDS)
