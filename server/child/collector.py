"""How often the cyclic garbage collector runs in a run, and in the analysis of its layout.

A capture keeps a record per shape drawn and an analysis holds millions of shapely
geometries. At Python's default pace (a collection every 700 new objects, about every
hundredth of them a full pass over every live object) the collector took about 0.5 s of
a 1M-shape capture and 0.8 s of its check (tests/bench/bench_gc.py: medians, paired
ratios 0.79-0.91 and 0.76-0.94). A collection every 100,000 new objects still collects
every cycle. Standard library only: this runs in the user's interpreter.
"""

from __future__ import annotations

import gc

THRESHOLDS = (100_000, 10, 10)


def pace_for_layouts():
    """Collect every THRESHOLDS[0] new objects instead of every 700 (the full passes follow)."""
    gc.set_threshold(*THRESHOLDS)
