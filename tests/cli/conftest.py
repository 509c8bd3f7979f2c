"""Every CLI test keeps the caution's session marker in its own temporary cache folder."""

from __future__ import annotations

import pytest


@pytest.fixture(autouse=True)
def private_cache(tmp_path, monkeypatch):
    # Never touch the user's real ~/.cache; each test starts a fresh session of use.
    folder = tmp_path / "cache"
    monkeypatch.setenv("XDG_CACHE_HOME", str(folder))
    return folder
