"""Placeholder: built by the issue "From runs to the answer"."""

from livefilt.errors import LivefiltError


def main(args) -> int:
    raise LivefiltError("livefilt range: not built yet")
