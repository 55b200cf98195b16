"""The stack log's chains of outer frames (server/child/recording.py): derived from a caller's
known chain, they equal a walk of the live stack, and a helper frame made afresh per shape
reuses one chain."""

import sys

import pytest

from latchwatch.server.child.recording import StackRecorder

pytestmark = pytest.mark.fast


def walked(frame, depth):
    """The chain of ``frame`` by walking the stack: (its code, ((code, lasti), ...) of its callers)."""
    outer, above = [], frame.f_back
    while above is not None and len(outer) < depth:
        outer.append((above.f_code, above.f_lasti))
        above = above.f_back
    return frame.f_code, tuple(outer)


def test_derived_chains_equal_a_walk_of_the_stack_and_are_shared():
    recorder = StackRecorder(depth=6)  # four outer frames
    seen = []

    def helper():  # a new frame on every call, as a drawing helper's
        frame = sys._getframe()
        seen.append((recorder.chain_id(frame), walked(frame, recorder.outer_depth)))

    def cell():
        for _ in range(3):
            helper()
        helper()

    def outer():
        cell()

    outer()
    for cid, expected in seen:
        assert recorder.chains[cid] == expected
    # The loop's three calls share one chain; the call on the next line has its own.
    assert seen[0][0] == seen[1][0] == seen[2][0] != seen[3][0]
    assert len(recorder.chains[seen[0][0]][1]) == recorder.outer_depth


def test_without_outer_frames_a_chain_is_its_own_code():
    recorder = StackRecorder(depth=2)
    frame = sys._getframe()
    assert recorder.chains[recorder.chain_id(frame)] == (frame.f_code, ())
