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
        # (code, caller's code, caller's offset, caller's chain id) -> chain id
        self.derived = {}
        self.chain_of_frame = {}
        self.sweep_at = 4096
        self.written = []  # the layout files the script wrote (child/naming.py note_written), shared by the backends

    def chain_id(self, frame):
        """Chain id for the frames from ``frame`` outwards (slow path, cached).

        Walks out only to the first frame whose chain is known, then derives each new
        frame's chain from its caller's: a helper called afresh for every shape (a new
        frame each time, as gdsfactory's ``add_polygon`` callers are) costs one lookup.
        """
        pending = []
        cid = 0
        while frame is not None:
            known = self.chain_of_frame.get(frame)
            if known is not None:
                cid = known
                break
            if frame.f_code.co_filename in HARNESS_FILES:
                self.chain_of_frame[frame] = 0
                break
            pending.append(frame)
            frame = frame.f_back
        caller = frame
        for frame in reversed(pending):  # outermost first: each one's caller is known by now
            cid = self._chain_below(frame, caller, cid)
            # A generator frame can be resumed from elsewhere: its callers are not fixed.
            if not frame.f_code.co_flags & _GENERATOR_FLAGS:
                if len(self.chain_of_frame) >= self.sweep_at:
                    self._sweep()
                self.chain_of_frame[frame] = cid
            caller = frame
        return cid

    def _chain_below(self, frame, caller, caller_cid):
        """The chain of ``frame`` whose caller ``caller`` (or None) has the chain ``caller_cid``."""
        if caller is None or caller_cid == 0 or not self.outer_depth:
            key = (id(frame.f_code), 0, -1, 0)
        else:
            key = (id(frame.f_code), id(caller.f_code), caller.f_lasti, caller_cid)
        cid = self.derived.get(key)
        if cid is None:
            if key[3] == 0:
                outer = ()
            else:
                caller_code, caller_outer = self.chains[caller_cid]
                outer = ((caller_code, caller.f_lasti),) + caller_outer[:self.outer_depth - 1]
            interned = (id(frame.f_code), tuple((id(code), lasti) for code, lasti in outer))
            cid = self.chain_index.get(interned)
            if cid is None:
                cid = self.chain_index[interned] = len(self.chains)
                self.chains.append((frame.f_code, outer))
            self.derived[key] = cid
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
