"""tap-contact-distance against hand geometry, at SG13G2's published limit (IHP-Open-PDK
SG13G2_os_layout_rules.pdf Rev 0.4, LU.c / LU.c1 / LU.d / LU.d1: a tie extends at most
6.00 um beyond its contact)."""

import math

import pytest

from latchwatch.analyzers.check import check_outcome
from latchwatch.analyzers.context import CheckOptions
from latchwatch.analyzers.rules import RULES_BY_ID
from latchwatch.server.config.techfiles import load_technology

from builders import CellBuilder, layout, outcome

# SG13G2 layers (Rules Rev 0.4, layer table): Activ, pSD, Cont, NWell.
ACTIV, PSD, CONT, NWELL = (1, 0), (14, 0), (6, 0), (31, 0)


@pytest.fixture(scope="module")
def sg13g2():
    return load_technology("sg13g2")


def findings(cell, tech):
    return check_outcome(outcome(layout(cell)), tech, CheckOptions(),
                         rules=(RULES_BY_ID["tap-contact-distance"],)).findings


def ptap(length, contacts=((0.3, 0.7),), pieces=1):
    """A p-tie (Activ under pSD, outside NWell) from x = 0 to ``length``, 1 um tall, drawn
    in ``pieces`` abutting rectangles, with square contacts spanning y 0.3-0.7 at each
    given x range."""
    c = CellBuilder("T")
    edges = [length * k / pieces for k in range(pieces + 1)]
    for x0, x1 in zip(edges, edges[1:], strict=False):
        c.rect(ACTIV, x0, 0, x1, 1).rect(PSD, x0, 0, x1, 1)
    for x0, x1 in contacts:
        c.rect(CONT, x0, 0.3, x1, 0.7)
    return c


def test_a_tie_within_6_um_of_its_contact_passes(sg13g2):
    # Farthest point: the far corner, hypot(6.5 - 0.7, 0.3) = 5.808 um.
    assert findings(ptap(6.5), sg13g2) == []


def test_a_tie_past_6_um_fails_with_the_distance_to_its_far_corner(sg13g2):
    [f] = findings(ptap(7.0), sg13g2)
    assert f.limit == 6.0
    assert f.value == pytest.approx(math.hypot(7.0 - 0.7, 0.3), abs=2e-3)  # hand: 6.307 um
    assert f.message.startswith("p-tap reaches 6.31 um beyond its nearest contact")
    assert f.related[0].message == "nearest contact"


def test_a_contact_at_each_end_covers_a_long_tie(sg13g2):
    # 12 um with contacts at both ends: the middle is hypot(6 - 0.7, 0.7) = 5.35 um away.
    assert findings(ptap(12.0, contacts=((0.3, 0.7), (11.3, 11.7))), sg13g2) == []


def test_a_tie_drawn_in_pieces_is_one_tie(sg13g2):
    # Three abutting pieces, one contact: one finding, the same distance as undivided.
    [f] = findings(ptap(7.0, pieces=3), sg13g2)
    assert f.value == pytest.approx(math.hypot(7.0 - 0.7, 0.3), abs=2e-3)


def test_an_ntie_in_its_well_is_checked_too(sg13g2):
    # An n-tie (Activ not pSD, inside NWell: the preset's derived N+) 8 um long.
    c = CellBuilder("T").rect(NWELL, -2, -2, 10, 3).rect(ACTIV, 0, 0, 8, 1).rect(CONT, 0.3, 0.3, 0.7, 0.7)
    [f] = findings(c, sg13g2)
    assert f.message.startswith("n-tap reaches")
    assert f.value == pytest.approx(math.hypot(8 - 0.7, 0.3), abs=2e-3)


def test_off_without_a_limit(sg13g2):
    # The gf180mcu preset sets no tap-contact-distance limit (its manual gives none): the
    # same 30 um p-tie drawn on GF180MCU layers (COMP 22/0, Pplus 31/0, Contact 33/0;
    # design manual tables_clear/06_Drawn_layer10.csv) gives nothing, on SG13G2 layers a finding.
    gf = CellBuilder("T").rect((22, 0), 0, 0, 30, 1).rect((31, 0), 0, 0, 30, 1).rect((33, 0), 0.3, 0.3, 0.7, 0.7)
    assert findings(gf, load_technology("gf180mcu")) == []
    assert len(findings(ptap(30.0), sg13g2)) == 1
