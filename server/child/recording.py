"""The stack log shared by every capture backend: cheap records, chains of outer frames cached.

A backend calls ``record`` style code on every shape it sees added; one record holds the
caller's code object and instruction offset, the offset of the frame above it, and a
cached id for the chain of frames further out. That chain is cached on the live frame
object: while a frame runs, its callers are suspended at fixed positions, so the chain
above it cannot change. Lines are resolved once per unique position, at collection.
Standard library only.
"""

from __future__ import annotations

import sys

from .stacks import _GENERATOR_FLAGS, HARNESS_FILES, STACK_DEPTH


class StackRecorder:
    """Chains of outer frames, interned per run; turns a record into a stack of StackTables."""

    def __init__(self, depth=STACK_DEPTH):
        self.outer_depth = max(depth - 2, 0)
        # chain id -> (code of the frame above the caller, ((code, lasti), ...) further out)
        self.chains = [(None, ())]
        self.chain_index = {}
        self.chain_of_frame = {}
        self.sweep_at = 4096
        self.written = []  # the layout files the script wrote (child/naming.py note_written), shared by the backends

    def chain_id(self, frame):
        """Chain id for the frames from ``frame`` outwards (slow path, cached)."""
        if frame is None:
            return 0
        if frame.f_code.co_filename in HARNESS_FILES:
            self.chain_of_frame[frame] = 0
            return 0
        outer = []
        above = frame.f_back
        while above is not None and len(outer) < self.outer_depth:
            code = above.f_code
            if code.co_filename in HARNESS_FILES:
                break
            outer.append((code, above.f_lasti))
            above = above.f_back
        key = (id(frame.f_code), tuple((id(code), lasti) for code, lasti in outer))
        cid = self.chain_index.get(key)
        if cid is None:
            cid = self.chain_index[key] = len(self.chains)
            self.chains.append((frame.f_code, tuple(outer)))
        # A generator frame can be resumed from elsewhere: its callers are not fixed.
        if not frame.f_code.co_flags & _GENERATOR_FLAGS:
            if len(self.chain_of_frame) >= self.sweep_at:
                self._sweep()
            self.chain_of_frame[frame] = cid
        return cid

    def _sweep(self):
        """Forget finished frames, so the cache does not keep their locals alive."""
        for frame in list(self.chain_of_frame):
            # References: the dict key, the list, the loop variable and the argument.
            # A running frame has one more, held by the interpreter.
            if sys.getrefcount(frame) <= 4:
                del self.chain_of_frame[frame]
        self.sweep_at = max(4096, 2 * len(self.chain_of_frame))

    def caller_record(self, subject, depth=2):
        """(subject, code, lasti, lasti above, chain) for the frame ``depth`` levels up (slow path)."""
        try:
            frame = sys._getframe(depth)
        except ValueError:
            return (subject, None, -1, -1, 0)
        above = frame.f_back
        return (subject, frame.f_code, frame.f_lasti, above.f_lasti if above else -1, self.chain_id(above))

    def stack_of(self, tables, code, lasti, above_lasti, cid):
        """The stack id in ``tables`` of one record's position (-1 for a record without a caller)."""
        if code is None:
            return -1
        ids = [tables.frame_id(code, lasti)]
        above_code, outer = self.chains[cid]
        if above_code is not None:
            ids.append(tables.frame_id(above_code, above_lasti))
            ids.extend(tables.frame_id(code, lasti) for code, lasti in outer)
        return tables.stack_id(ids)
