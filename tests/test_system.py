"""The skip-or-fail rule of tests/system.py: a test whose system part is
missing skips on a laptop and fails in CI (``CI`` or ``LIVEFILT_REQUIRE_SYSTEM``)."""

import pytest

from tests import system


@pytest.mark.parametrize("var", ["CI", "LIVEFILT_REQUIRE_SYSTEM"])
def test_missing_part_fails_in_ci(monkeypatch, var):
    monkeypatch.delenv("CI", raising=False)
    monkeypatch.delenv("LIVEFILT_REQUIRE_SYSTEM", raising=False)
    monkeypatch.setenv(var, "1")
    with pytest.raises(pytest.fail.Exception, match="system part missing in CI: no sound server"):
        system.require(False, "no sound server")
    with pytest.raises(pytest.fail.Exception, match="no_such_module_here not importable"):
        system.need_module("no_such_module_here", "pip install it")
    system.require(True, "present: nothing happens")


def test_missing_part_skips_elsewhere(monkeypatch):
    monkeypatch.delenv("CI", raising=False)
    monkeypatch.delenv("LIVEFILT_REQUIRE_SYSTEM", raising=False)
    with pytest.raises(pytest.skip.Exception, match="no sound server"):
        system.require(False, "no sound server")
    with pytest.raises(pytest.skip.Exception, match="no_such_module_here not importable"):
        system.need_module("no_such_module_here", "pip install it")


@pytest.mark.parametrize("value", ["", "0", "false", "False", "no", "off"])
def test_an_explicit_off_value_is_not_ci(monkeypatch, value):
    # CI services set CI=true; a laptop's CI=false (or 0) must not turn skips into failures
    monkeypatch.delenv("LIVEFILT_REQUIRE_SYSTEM", raising=False)
    monkeypatch.setenv("CI", value)
    assert not system.strict()
    monkeypatch.setenv("CI", "true")
    assert system.strict()
