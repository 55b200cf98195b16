"""The entry point of every child: ``python -I start.py CONFIG_JSON`` (server/sandbox/workers.py).

Under ``-I`` nothing beside this file is importable, and latchwatch itself may not be
installed in the user's interpreter; so this folder is loaded as a private package,
``latchwatch_child``, whose modules import each other relatively. The parent imports the
same modules as ``latchwatch.server.child`` (the wire format, the collection code).
"""

import importlib.util
import os
import sys

PACKAGE = "latchwatch_child"


def load_package():
    """This folder as the package ``latchwatch_child`` (idempotent)."""
    if PACKAGE in sys.modules:
        return sys.modules[PACKAGE]
    folder = os.path.dirname(os.path.abspath(__file__))
    spec = importlib.util.spec_from_file_location(PACKAGE, os.path.join(folder, "__init__.py"),
                                                  submodule_search_locations=[folder])
    package = importlib.util.module_from_spec(spec)
    sys.modules[PACKAGE] = package
    spec.loader.exec_module(package)
    return package


if __name__ == "__main__":
    sys.dont_write_bytecode = True  # the child writes nothing outside its run folder
    load_package()
    importlib.import_module(PACKAGE + ".boot").main()
