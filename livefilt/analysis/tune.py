"""Placeholder: built by the issue "Tune"."""

from livefilt.errors import LivefiltError


def main(args) -> int:
    raise LivefiltError("livefilt tune: not built yet")
