"""The package's one exception tree.

Every error a user can cause is a :class:`LivefiltError`; the CLI prints its
``str()`` as a single line and exits with status 2, never a traceback.

- :class:`SettingError`: an invalid setting, naming the field path, the value
  received and what is allowed (``chains[0].stages[2].cutoff_hz = 30000: must be
  below Nyquist, 24000 Hz``).
- :class:`SourceError`: an input driver cannot open or read its device.
- :class:`SourceUnavailable`: a driver's library or device is absent (the reason
  says how to get it).
- :class:`RecordingError`: a run folder cannot be written or read.
"""

from __future__ import annotations

__all__ = [
    "LivefiltError",
    "SettingError",
    "SourceError",
    "SourceUnavailable",
    "RecordingError",
]


class LivefiltError(Exception):
    """Base class of every error livefilt raises on purpose."""


class SettingError(LivefiltError, ValueError):
    """An invalid setting.

    Parameters
    ----------
    field : str
        Path of the field relative to where it was checked (``"cutoff_hz"``);
        callers higher up prefix their part with :meth:`within`.
    value : object
        The value received.
    allowed : str
        What is allowed, in words, with units (``"must be below Nyquist, 24000 Hz"``).
    """

    def __init__(self, field: str, value: object, allowed: str):
        self.field = field
        self.value = value
        self.allowed = allowed
        super().__init__(str(self))

    def __str__(self) -> str:
        if self.field:
            return f"{self.field} = {self.value!r}: {self.allowed}"
        return f"{self.value!r}: {self.allowed}"

    def within(self, prefix: str) -> "SettingError":
        """Return the same error with ``prefix`` put in front of the field path.

        ``SettingError("cutoff_hz", ...).within("chains[0].stages[2]")`` names
        ``chains[0].stages[2].cutoff_hz``; an index part (``"[3]"``) joins
        without a dot.
        """
        if not self.field:
            field = prefix
        elif self.field.startswith("["):
            field = prefix + self.field
        else:
            field = f"{prefix}.{self.field}"
        return SettingError(field, self.value, self.allowed)


class SourceError(LivefiltError):
    """An input driver failed to open or read its device."""


class SourceUnavailable(SourceError):
    """A driver cannot run here (library or device missing); the text says why."""


class RecordingError(LivefiltError):
    """A run folder could not be written or read."""
