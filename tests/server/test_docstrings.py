"""Every public function and class of the package says what it is for (a docstring)."""

import ast

from locations import ROOT


def test_public_functions_and_classes_have_docstrings():
    missing = []
    for folder in ("analyzers", "server"):
        for path in sorted((ROOT / folder).rglob("*.py")):
            tree = ast.parse(path.read_text(encoding="utf-8"))
            for node in tree.body:
                if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)) \
                        and not node.name.startswith("_") and ast.get_docstring(node) is None:
                    missing.append(f"{path.relative_to(ROOT)}:{node.lineno} {node.name}")
    assert missing == []
