"""Skip-or-fail for tests that need a system part (sound server, AVR tools, simulator).

On a laptop without the part the test skips with the reason; in CI (``CI`` or
``LIVEFILT_REQUIRE_SYSTEM`` set) the same condition fails the test, so a green
CI means every such test ran.
"""

import os

import pytest

__all__ = ["require", "strict"]


def strict() -> bool:
    return bool(os.environ.get("LIVEFILT_REQUIRE_SYSTEM") or os.environ.get("CI"))


def require(ok: bool, reason: str) -> None:
    """Skip (locally) or fail (in CI) unless ``ok``."""
    if ok:
        return
    if strict():
        pytest.fail(f"system part missing in CI: {reason}")
    pytest.skip(reason)
