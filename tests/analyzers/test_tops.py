"""Top-cell choice (analyzers/layout/tops.py) on hand-built reference graphs."""

import numpy as np
import pytest

from latchwatch.analyzers.check import checked_tops
from latchwatch.analyzers.layout.tops import CheckedTop, choose_tops, outermost, reachable
from latchwatch.analyzers.model.captured import NamedCell
from latchwatch.analyzers.model.findings import Frame
from tests.builders import ACTIVE, CellBuilder, layout, outcome


def graph(*edges_per_cell):
    return [np.asarray(edges, dtype=np.int32) for edges in edges_per_cell]


def test_reachable_follows_references_through_every_level_and_not_the_start():
    # 0 -> 1 -> 2, 3 alone
    children = graph([1], [2], [], [])
    assert reachable(children, np.array([0])).tolist() == [False, True, True, False]


def test_outermost_drops_a_candidate_inside_another_and_keeps_order():
    children = graph([1], [2], [], [])
    assert outermost([2, 3, 0, 1, 0], children) == [3, 0]


def test_outermost_of_a_reference_cycle_is_empty():
    assert outermost([0, 1], graph([1], [0])) == []


def named_layout(named, *cells, frames=(), stacks=()):
    captured = layout(*cells, frames=frames, stacks=stacks)
    captured.named = named
    return captured


def gdsfactory_like():
    """Cells as a gdsfactory 9 run leaves them: cached intermediates beside the named top.

    0 straight (cached, unreferenced), 1 rectangle (a boolean input, unreferenced),
    2 boolean (referenced by top), 3 top, 4 Unnamed_3 (unreferenced), 5 $$$CONTEXT_INFO$$$.
    """
    names = ["straight_L10", "rectangle_S4_4", "boolean_1", "top", "Unnamed_3", "$$$CONTEXT_INFO$$$"]
    cells = [CellBuilder(n).rect(ACTIVE, 0, 0, 1, 1) for n in names]
    cells[3].ref(2)
    for target in range(5):
        cells[5].ref(target)
    return cells


def test_the_written_top_is_checked_alone_with_the_line_that_wrote_it():
    frames = [Frame("/site-packages/kfactory/kcell.py", 1414, "write"), Frame("/proj/chip.py", 9, "<module>")]
    captured = named_layout([NamedCell(3, "written", "top.gds", 0), NamedCell(0, "assigned", "s")],
                            *gdsfactory_like(), frames=frames, stacks=[(0, 1)])
    (top,) = choose_tops(captured, "/proj")
    assert top == CheckedTop(3, "top", "written", "top.gds", "/proj/chip.py", 9)
    assert top.reason == "written by the script to top.gds"


def test_without_naming_every_unreferenced_cell_but_the_metadata_cell_is_checked():
    tops = choose_tops(named_layout([], *gdsfactory_like()))
    assert [(t.name, t.reason) for t in tops] == [(n, "not referenced by another cell") for n in
                                                   ("straight_L10", "rectangle_S4_4", "top", "Unnamed_3")]


def test_assigned_cells_count_when_nothing_is_written_and_a_cell_inside_another_drops_out():
    named = [NamedCell(2, "assigned", "b"), NamedCell(3, "assigned", "top")]
    (top,) = choose_tops(named_layout(named, *gdsfactory_like()))
    assert (top.name, top.reason, top.line) == ("top", "assigned to top at module level", None)


def test_a_returned_cell_beats_a_written_one():
    named = [NamedCell(0, "written", "all.gds"), NamedCell(3, "returned", "chip")]
    (top,) = choose_tops(named_layout(named, *gdsfactory_like()))
    assert (top.name, top.reason) == ("top", "returned by chip()")


def test_a_named_metadata_cell_is_no_top_and_the_next_tier_decides():
    named = [NamedCell(5, "written", "x.gds"), NamedCell(1, "assigned", "r")]
    assert [t.name for t in choose_tops(named_layout(named, *gdsfactory_like()))] == ["rectangle_S4_4"]


def test_a_written_and_a_shown_cell_are_one_tier():
    named = [NamedCell(1, "shown", ""), NamedCell(3, "written", "")]
    tops = choose_tops(named_layout(named, *gdsfactory_like()))
    assert [(t.name, t.reason) for t in tops] == [("rectangle_S4_4", "shown by the script"),
                                                  ("top", "written by the script")]


def test_the_top_option_overrides_the_naming():
    captured = named_layout([NamedCell(3, "written", "top.gds")], *gdsfactory_like())
    (top,) = checked_tops(outcome(captured), "Unnamed_3")
    assert (top.name, top.reason) == ("Unnamed_3", "named by --top")


def test_named_cells_in_a_cycle_fall_back_and_the_cycle_is_reported():
    from latchwatch.analyzers.layout.flatten import HierarchyError

    cells = [CellBuilder("A").ref(1), CellBuilder("B").ref(0)]
    with pytest.raises(HierarchyError, match="cycle"):
        checked_tops(outcome(named_layout([NamedCell(0, "written", "x.gds"), NamedCell(1, "written", "x.gds")],
                                          *cells)), None)


def test_a_named_cell_needs_a_known_kind():
    with pytest.raises(ValueError, match="NamedCell.how"):
        NamedCell(0, "guessed")
