"""Skip-or-fail for tests that need a system part (sound server, AVR tools, simulator).

On a laptop without the part the test skips with the reason; in CI (``CI`` or
``LIVEFILT_REQUIRE_SYSTEM`` set) the same condition fails the test, so a green
CI means every such test ran.
"""

import os

import pytest

__all__ = ["require", "need_module", "strict"]


def _on(name: str) -> bool:
    # set and not an explicit "off" ("CI=false" on a laptop must not fail the run)
    return os.environ.get(name, "").strip().lower() not in ("", "0", "false", "no", "off")


def strict() -> bool:
    """In CI (or with LIVEFILT_REQUIRE_SYSTEM set) a missing system part fails."""
    return _on("LIVEFILT_REQUIRE_SYSTEM") or _on("CI")


def require(ok: bool, reason: str, module_level: bool = False) -> None:
    """Skip (locally) or fail (in CI) unless ``ok``; ``module_level`` for use
    at a test module's top."""
    if ok:
        return
    if strict():
        pytest.fail(f"system part missing in CI: {reason}", pytrace=False)
    pytest.skip(reason, allow_module_level=module_level)


def need_module(name: str, hint: str):
    """Import ``name`` for a test module, or skip it (locally) / fail it (in CI)."""
    import importlib
    try:
        return importlib.import_module(name)
    except ImportError as e:
        require(False, f"{name} not importable ({e}): {hint}", module_level=True)
