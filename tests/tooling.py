"""Find external tools the tests need; missing ones fail under CI and skip elsewhere."""
from __future__ import annotations

import os
import shutil

import pytest


def require_tool(name: str) -> str:
    """Path of ``name``; under CI=true its absence is a failure, elsewhere a skip."""
    path = shutil.which(name)
    if path:
        return path
    if os.environ.get("CI") == "true":
        pytest.fail(f"{name} is required in CI (.ci/run installs it) but is not on PATH")
    pytest.skip(f"{name} not installed")
