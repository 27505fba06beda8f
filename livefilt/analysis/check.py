"""Placeholder: built by the issue "Acquisition self-check"."""

from livefilt.errors import LivefiltError


def main(args) -> int:
    raise LivefiltError("livefilt check: not built yet")
