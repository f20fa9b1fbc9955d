"""Shared test setup: the test run never writes into the user's own cache folder."""

from __future__ import annotations

from collections.abc import Iterator

import pytest


@pytest.fixture(scope="session", autouse=True)
def _private_user_cache(tmp_path_factory: pytest.TempPathFactory) -> Iterator[None]:
    """``BENCHSUITE_CACHE_DIR`` points into the session's temporary folder (subprocesses inherit it).

    Optima of instances outside the built-in catalogue go to the user's cache
    folder (benchsuite.optimum.user_cache_dir); tests must not fill the real one.
    """
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("BENCHSUITE_CACHE_DIR", str(tmp_path_factory.mktemp("user-cache")))
        yield
