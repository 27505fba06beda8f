"""One processing chain: stateful filter stages, then a detector.

A :class:`Chain` takes blocks of one input channel (and, for a measured
reference, the reference channel) and returns the filtered block and the
detector rows due in it.  A and B are simply two chains on the same samples.
Settings change at a block boundary through :meth:`Chain.retune`, keeping the
filter state steady (no transient beyond the new filter's own step response).
"""

from __future__ import annotations

import numpy as np

from livefilt.config import ChainSettings
from livefilt.dsp.design import chain_sos, frequency_response
from livefilt.dsp.detect import ReferenceSpec, make_detector
from livefilt.dsp.sections import SosFilter

__all__ = ["Chain"]


class Chain:
    """Stages then detector, for one input channel.

    Parameters
    ----------
    settings : ChainSettings
    fs : float
        Sample rate, Hz.
    reference : ReferenceSpec or None
    output_every : int
        Detector rows are due at sample indices that are multiples of this.
    channel : int
        Resolved input channel index.
    """

    def __init__(self, settings: ChainSettings, fs: float, reference: ReferenceSpec | None,
                 output_every: int, channel: int):
        self.settings = settings
        self.name = settings.name
        self.fs = fs
        self.reference = reference
        self.output_every = output_every
        self.channel = channel
        self.ref_channel = reference.channel if reference is not None else None
        self.filter = SosFilter(chain_sos(settings.stages, fs))
        self.detector = make_detector(settings.detector, reference, fs, output_every)

    @property
    def sos(self) -> np.ndarray:
        return self.filter.sos

    def process(self, x: np.ndarray, start_index: int, ref: np.ndarray | None,
                out: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Filter ``x`` (float64) and detect; returns (filtered block, rows)."""
        y = self.filter.process(x, out=out)
        return y, self.detect(y, start_index, ref)

    def detect(self, y: np.ndarray, start_index: int, ref: np.ndarray | None) -> np.ndarray:
        """The detector rows due in an already filtered block ``y``."""
        return self.detector.process(y, start_index, ref)

    def note_gap(self, frames: int) -> None:
        self.detector.note_gap(frames)

    def set_reference(self, reference: ReferenceSpec) -> None:
        """Use a new reference (at a block boundary); the detector starts afresh."""
        self.reference = reference
        self.ref_channel = reference.channel if reference is not None else None
        self.detector = make_detector(self.settings.detector, reference, self.fs, self.output_every)

    def retune(self, settings: ChainSettings) -> None:
        """Apply new settings at a block boundary.

        Filter coefficients change with the state moved to the new filter's
        steady state for the last input (:meth:`SosFilter.retune`); the
        detector is rebuilt only when its own settings changed.
        """
        if settings.stages != self.settings.stages:
            self.filter.retune(chain_sos(settings.stages, self.fs))
        if settings.detector != self.settings.detector:
            self.detector = make_detector(settings.detector, self.reference, self.fs,
                                          self.output_every)
        self.settings = settings
        self.name = settings.name

    def response(self, freqs_hz: np.ndarray) -> np.ndarray:
        """Complex response of the stages at ``freqs_hz``."""
        return frequency_response(self.filter.sos, freqs_hz, self.fs)
