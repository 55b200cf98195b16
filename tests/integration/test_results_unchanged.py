"""Speed work must not change results: findings and device figures match the stored reference.

The reference (tests/data/results_reference.json) was written by tests/results_reference.py
with the code before the speed changes; see that module for when to re-write it.
"""

from __future__ import annotations

import functools
import json

import pytest
from results_reference import REFERENCE, collect


@functools.cache
def current() -> dict[str, dict]:
    return collect()


def stored() -> dict[str, dict]:
    return json.loads(REFERENCE.read_text(encoding="utf-8"))


def first_differences(expected: list, actual: list, limit: int = 5) -> list[str]:
    out = [f"{len(expected)} expected, {len(actual)} now"] if len(expected) != len(actual) else []
    for i, (e, a) in enumerate(zip(expected, actual, strict=False)):
        if e != a:
            keys = sorted(k for k in set(e) | set(a) if e.get(k) != a.get(k))
            out.append(f"#{i}: " + ", ".join(f"{k}: {e.get(k)!r} -> {a.get(k)!r}" for k in keys))
            if len(out) >= limit:
                break
    return out


def test_the_reference_covers_the_benchmarks_and_every_example():
    names = set(stored())
    assert {"gen_row_20000.py", "gen_row_hier_20000.py"} <= names
    assert set(current()) == names


@pytest.mark.parametrize("name", sorted(stored()))
def test_results_are_those_of_the_reference(name):
    expected, actual = stored()[name], current()[name]
    assert actual["runs"] == expected["runs"]
    assert actual["summary"] == expected["summary"]
    for key in ("findings", "devices"):
        assert actual[key] == expected[key], f"{name} {key} differ:\n" + "\n".join(
            first_differences(expected[key], actual[key]))
