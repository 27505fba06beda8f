"""livefilt: live acquisition and causal filtering for modulated-light sensors.

Data flow (one direction, one sub-package per box; nothing imports upward):
``livefilt.drivers`` -> :mod:`livefilt.acquire` (source contract, ring) ->
:mod:`livefilt.stream` (engine; chains of :mod:`livefilt.dsp` filters and
detectors) -> outputs: :mod:`livefilt.runs` (recorder), display taps, the
terminal read-out and :mod:`livefilt.window`; :mod:`livefilt.analysis` turns
settings and recorded runs into reports.
"""

__version__ = "0.1.0"
__all__ = ["__version__"]
