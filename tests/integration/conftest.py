"""Fixtures of the end-to-end language-server tests."""

import os

import pytest

from lsp_client import Session


@pytest.fixture
def env(tmp_path):
    return {**os.environ, "XDG_CONFIG_HOME": str(tmp_path / "xdg-config"), "XDG_CACHE_HOME": str(tmp_path / "xdg-cache")}


@pytest.fixture
async def session(env):
    sessions = []

    def new() -> Session:
        sessions.append(Session(env))
        return sessions[-1]

    yield new
    for s in sessions:
        await s.stop()
