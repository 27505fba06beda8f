"""Placeholder: built by the issue "Design before you build"."""

from livefilt.errors import LivefiltError


def main(args) -> int:
    raise LivefiltError("livefilt design: not built yet")
