"""Capture for KLayout's Python database (``klayout.db``, ``pya``; kfactory and gdsfactory 9 build on it).

KLayout's classes are extension types; their methods can be replaced on the class, and
every caller reaches the replacement, whichever module name it imported the class
under. Each shape insertion (``Shapes.insert`` and its ``insert_box`` style aliases)
logs the ``Shape`` it returned with the caller's stack (child/recording.py), each
``Cell.insert`` the ``Instance``. KLayout compares a ``Shape`` or ``Instance`` by the
stored object it points at, so at collection the shapes found in a cell map back to
their records (child/collect_klayout.py); the layout can reorder its shapes meanwhile.

Nothing here imports klayout: ``ImportWatch`` installs the capture when the script's
import of ``klayout.dbcore`` (the compiled module behind every name) has run, so a
script that never uses KLayout never pays for loading it.
"""

from __future__ import annotations

import sys

from .naming import file_argument, note_written
from .recording import StackRecorder
from .stacks import STACK_DEPTH

DATABASE_MODULE = "klayout.dbcore"


# Shapes methods beside ``insert`` that insert one shape and return its Shape (the
# plain ``insert`` also takes whole containers: Region, Shapes, Edges, an iterator).
SHAPE_INSERT_ALIASES = (
    "insert_box", "insert_box_with_properties", "insert_polygon", "insert_polygon_with_properties",
    "insert_simple_polygon", "insert_simple_polygon_with_properties", "insert_path", "insert_path_with_properties",
    "insert_text", "insert_text_with_properties",
)


# Instance properties and methods that change a placement in place (kfactory's and
# gdsfactory's move, rotate, mirror, connect and xmin-style setters use them): each
# change is logged as the placement before and after, so the instance keeps the
# stack of its insert.
PLACEMENT_SETTERS = ("trans", "dtrans", "cplx_trans", "dcplx_trans", "cell_inst", "dcell_inst",
                     "a", "b", "da", "db", "na", "nb", "cell_index", "cell")
PLACEMENT_METHODS = ("transform", "transform_into")


# Cell methods that fill the cell with shapes made inside KLayout, which no insert
# logged: such shapes take the stack of that call.
BULK_CELL_CALLS = ("flatten", "copy_shapes", "move_shapes", "copy_tree", "move_tree")


class KlayoutRecorder(StackRecorder):
    """Per-run log of the patched KLayout methods: records of (subject, code, lasti, lasti above, chain)."""

    def __init__(self, depth=STACK_DEPTH):
        super().__init__(depth)
        self.layouts = []  # every Layout the script made, kept alive for collection
        self.shapes = []  # subject: the Shape inserted
        # subject: (layout, parent cell index, CellInstArray). Not the Instance: after a
        # flatten KLayout may crash on an Instance object that outlived its instance.
        # A placement changed in place is a record without a stack whose subject also
        # holds the CellInstArray before the change (_placement_changing).
        self.instances = []
        self.bulk = []  # subject: (layout, cell index) of a cell a flatten, a copy or a whole container filled
        self.installed = False
        self.install_error = None  # why the capture could not be installed on the script's klayout

    @property
    def used(self):
        """Whether the script put anything into a KLayout cell."""
        return bool(self.shapes or self.instances or self.bulk)


def _logging(base, recorder, route, depth=1):
    """``base`` wrapped to log its call: ``route(self, result)`` gives (log, subject), or None to log nothing.

    The record's position is the caller ``depth`` frames above the wrapper.
    """
    getframe = sys._getframe
    chain_of_frame = recorder.chain_of_frame
    chain_id = recorder.chain_id

    def logged(self, *args, **kwargs):
        result = base(self, *args, **kwargs)
        target = route(self, result)
        if target is None:
            return result
        log, subject = target
        try:
            caller = getframe(depth)
            above = caller.f_back
            cid = chain_of_frame.get(above)
            if cid is None:
                cid = chain_id(above)
            log.append((subject, caller.f_code, caller.f_lasti, above.f_lasti, cid))
        except Exception:
            log.append(recorder.caller_record(subject, depth + 1))
        return result

    logged.__name__ = base.__name__
    logged.__doc__ = base.__doc__
    return logged


def _shape_insert(base, recorder, kdb):
    """``Shapes.insert`` logged; a flat Region is inserted polygon by polygon.

    KLayout inserts a Region's raw polygons as they are, with their properties; doing it
    one by one stores the same shapes, each with a Shape to log, and returns the
    container, as the bulk insert does. Other containers (Shapes, Edges, iterators)
    go in whole: the cell's unlogged shapes take the line of that call.
    """
    shape_type, region_type = kdb.Shape, kdb.Region
    log, bulk = recorder.shapes, recorder.bulk

    def route(shapes, result):
        if type(result) is shape_type:
            return log, result
        cell = shapes.cell()
        return (bulk, (cell.layout(), cell.cell_index())) if cell is not None else None

    logged = _logging(base, recorder, route, depth=2)

    def insert(self, *args, **kwargs):
        if len(args) == 1 and not kwargs and type(args[0]) is region_type and not args[0].is_deep():
            _subject, code, lasti, above_lasti, cid = recorder.caller_record(None)
            log.extend((base(self, polygon), code, lasti, above_lasti, cid) for polygon in args[0].each())
            return self
        return logged(self, *args, **kwargs)

    insert.__name__ = base.__name__
    insert.__doc__ = base.__doc__
    return insert


def _placement_changing(change, instance_log):
    """``change(instance, ...)`` logged as (layout, parent, placement after, placement before)."""

    def changed(self, *args, **kwargs):
        try:
            before = self.cell_inst
        except Exception:  # an instance KLayout no longer holds: the call raises as it would unlogged
            return change(self, *args, **kwargs)
        result = change(self, *args, **kwargs)
        parent = self.parent_cell
        if parent is not None:
            instance_log.append(((parent.layout(), parent.cell_index(), self.cell_inst, before), None, -1, -1, 0))
        return result

    return changed


def _log_placement_changes(instance_type, instance_log):
    for name in PLACEMENT_SETTERS:
        descriptor = instance_type.__dict__.get(name)
        if descriptor is not None and hasattr(descriptor, "__set__"):
            setattr(instance_type, name, property(descriptor.__get__,
                                                  _placement_changing(descriptor.__set__, instance_log),
                                                  doc=descriptor.__doc__))
    for name in PLACEMENT_METHODS:
        base = getattr(instance_type, name, None)
        if base is not None:
            setattr(instance_type, name, _placement_changing(base, instance_log))


def install(recorder, kdb):
    """Replace the insertion methods of ``kdb`` (klayout.dbcore) by logging ones; idempotent per run."""
    if recorder.installed:
        return
    recorder.installed = True
    shape_log, instance_log, bulk_log = recorder.shapes, recorder.instances, recorder.bulk
    instance_type = kdb.Instance
    for name in SHAPE_INSERT_ALIASES:
        base = getattr(kdb.Shapes, name, None)
        if base is not None:
            setattr(kdb.Shapes, name, _logging(base, recorder, lambda shapes, shape: (shape_log, shape)))
    kdb.Shapes.insert = _shape_insert(kdb.Shapes.insert, recorder, kdb)

    def instance_route(cell, result):
        if type(result) is not instance_type:
            return None
        return instance_log, (cell.layout(), cell.cell_index(), result.cell_inst)

    kdb.Cell.insert = _logging(kdb.Cell.insert, recorder, instance_route)
    _log_placement_changes(instance_type, instance_log)
    for name in BULK_CELL_CALLS:
        base = getattr(kdb.Cell, name, None)
        if base is not None:
            setattr(kdb.Cell, name, _logging(base, recorder, lambda cell, _result: (
                bulk_log, (cell.layout(), cell.cell_index()))))
    _install_write_log(recorder, kdb)
    base_init = kdb.Layout.__init__
    layouts = recorder.layouts

    def layout_init(self, *args, **kwargs):
        base_init(self, *args, **kwargs)
        layouts.append(self)

    layout_init.__doc__ = base_init.__doc__
    kdb.Layout.__init__ = layout_init


# SaveLayoutOptions methods that change which cells a write selects: each maps the
# selection so far and the cell index to the new one (None: every cell).
SELECTIONS = {
    "select_all_cells": lambda chosen, *_args: None,
    "clear_cells": lambda chosen, *_args: (),
    "select_cell": lambda chosen, index, *_args: (index,),
    "select_this_cell": lambda chosen, index, *_args: (index,),
    "add_cell": lambda chosen, index, *_args: (chosen or ()) + (index,),
    "add_this_cell": lambda chosen, index, *_args: (chosen or ()) + (index,),
}


def _install_write_log(recorder, kdb):
    """Log ``Cell.write`` (the cell) and ``Layout.write`` (the cells its options select, else all)."""
    options_type = kdb.SaveLayoutOptions
    for name, change in SELECTIONS.items():
        base = getattr(options_type, name, None)
        if base is not None:
            setattr(options_type, name, _selecting(base, change))
    written = recorder.written
    cell_write, layout_write = kdb.Cell.write, kdb.Layout.write

    def write_cell(self, *args, **kwargs):
        result = cell_write(self, *args, **kwargs)
        note_written(written, [("klayout", self.layout(), self.cell_index())], file_argument(args, kwargs, "file_name"))
        return result

    def write_layout(self, *args, **kwargs):
        result = layout_write(self, *args, **kwargs)
        options = [a for a in list(args) + list(kwargs.values()) if isinstance(a, options_type)]
        chosen = getattr(options[0], "_lw_cells", None) if options else None
        targets = [("klayout", self, None)] if chosen is None else [("klayout", self, i) for i in chosen]
        note_written(written, targets, file_argument(args, kwargs, "filename"))
        return result

    for function, base in ((write_cell, cell_write), (write_layout, layout_write)):
        function.__name__, function.__doc__ = base.__name__, base.__doc__
    kdb.Cell.write, kdb.Layout.write = write_cell, write_layout


def _selecting(base, change):
    def select(self, *args, **kwargs):
        result = base(self, *args, **kwargs)
        try:
            self._lw_cells = change(getattr(self, "_lw_cells", None), *args)
        except (AttributeError, TypeError):  # an options object that takes no attribute: a write counts as all cells
            pass
        return result

    select.__name__, select.__doc__ = base.__name__, base.__doc__
    return select


class _InstallingLoader:
    """The real loader of klayout.dbcore, followed by the capture's install."""

    def __init__(self, loader, on_load):
        self.loader = loader
        self.on_load = on_load

    def create_module(self, spec):
        return self.loader.create_module(spec)

    def exec_module(self, module):
        self.loader.exec_module(module)
        self.on_load(module)


class ImportWatch:
    """A meta-path finder: when the script imports klayout.dbcore, install the capture on it."""

    def __init__(self, recorder):
        self.recorder = recorder

    def find_spec(self, name, path=None, target=None):
        """The spec the other finders give for klayout.dbcore, its loader wrapped; None for every other name."""
        if name != DATABASE_MODULE:
            return None
        for finder in sys.meta_path:
            if finder is self or not hasattr(finder, "find_spec"):
                continue
            spec = finder.find_spec(name, path, target)
            if spec is not None:
                if spec.loader is not None and hasattr(spec.loader, "exec_module"):
                    spec.loader = _InstallingLoader(spec.loader, self._loaded)
                return spec
        return None

    def _loaded(self, module):
        try:
            install(self.recorder, module)
        except Exception as error:  # the script runs on; its collection reports the failed capture
            self.recorder.install_error = error

    def start(self):
        """Watch from now on; install at once when klayout is already loaded (a host imported it)."""
        loaded = sys.modules.get(DATABASE_MODULE)
        if loaded is not None:
            install(self.recorder, loaded)
        else:
            sys.meta_path.insert(0, self)
