"""no-geometry: why nothing was checked, as a warning unless the file imports no layout library."""

import pytest

from latchwatch.analyzers.check import check_outcome, select_rules
from latchwatch.analyzers.model.findings import Severity
from latchwatch.server.config.techfiles import load_technology
from tests.builders import ACTIVE, CellBuilder, layout, outcome

DEMO = load_technology("demo")
RULES = select_rules(["no-geometry"])


def findings(*cells, imports=()):
    captured = layout(*cells)
    captured.imports = tuple(imports)
    return check_outcome(outcome(captured), DEMO, rules=RULES).findings


def test_a_library_without_capture_that_yielded_nothing_is_named():
    (finding,) = findings(imports=("phidl", "gdspy"))
    assert finding.severity is Severity.WARNING
    assert finding.message.startswith("no capture for library phidl, gdspy:")


def test_shapes_on_unnamed_layers_are_listed_sorted_and_capped():
    # The demo technology (server/config/technologies/demo.toml) names layers 1/0 to 12/0, none from 20 up.
    cell = CellBuilder("TOP")
    for layer in range(20, 31):
        cell.rect((layer, 0), 0, 0, 1, 1)
    cell.rect((20, 0), 2, 2, 3, 3).rect((99, 5), 0, 0, 1, 1)
    (finding,) = findings(cell, imports=("gdstk",))
    assert finding.severity is Severity.WARNING
    assert ("shapes only on layers the technology demo does not name: 20/0, 21/0, 22/0, 23/0, 24/0, 25/0, 26/0, "
            "27/0 and 4 more;") in finding.message


def test_other_layers_are_named_even_beside_a_library_without_capture():
    (finding,) = findings(CellBuilder("TOP").rect((99, 0), 0, 0, 1, 1), imports=("gdstk", "nazca"))
    assert "does not name: 99/0;" in finding.message


@pytest.mark.parametrize(("imports", "severity"), [(("gdsfactory", "klayout"), Severity.WARNING), ((), Severity.INFO)])
def test_nothing_drawn_warns_when_a_layout_library_was_imported(imports, severity):
    (finding,) = findings(CellBuilder("EMPTY"), imports=imports)
    assert finding.severity is severity
    assert finding.message == "script ran but drew no shapes on the layers of technology demo"


def test_one_shape_on_a_named_layer_is_enough():
    assert findings(CellBuilder("TOP").rect(ACTIVE, 0, 0, 1, 1).rect((99, 0), 0, 0, 1, 1),
                    imports=("phidl",)) == []
