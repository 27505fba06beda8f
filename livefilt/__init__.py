"""livefilt: live acquisition and causal filtering for modulated-light sensors.

Data flow (one direction): driver -> :mod:`livefilt.ring` -> :mod:`livefilt.engine`
(chains of :mod:`livefilt.sections` filters designed by :mod:`livefilt.design`,
then a :mod:`livefilt.detect` detector) -> read-out, display taps, recorder.
"""

__version__ = "0.1.0"
__all__ = ["__version__"]
