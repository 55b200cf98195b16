"""The report's one path shortener: paths inside the base become relative, others stay."""

from latchwatch.server.report.model import display_path


def test_paths_inside_the_base_become_relative_and_others_stay(tmp_path):
    inside = tmp_path / "cells" / "row.py"
    assert display_path(str(inside), tmp_path) == "cells/row.py"
    assert display_path("/elsewhere/row.py", tmp_path) == "/elsewhere/row.py"
    assert display_path(str(tmp_path.parent / (tmp_path.name + "x") / "a.py"), tmp_path).endswith("x/a.py")
    assert display_path("already/relative.py", tmp_path) == "already/relative.py"
    assert display_path(None, tmp_path) is None
