"""The window's words for config keys and their choices.

The forms show a person's label with its unit ("Cutoff (Hz)") and choices in
words ("Chebyshev type I"); the config key stays in the tooltip, and what the
forms send back to the engine is always the config's own key and value, so
the loader's validation remains the one path.

API
---
- :func:`label` (key, context) -> text shown beside a field.
- :func:`tooltip` (key, context) -> what the field means, and its config key.
- :func:`choices` (kind) -> [(config value, words)] for a drop-down.
- :func:`choice_words` (kind, value) -> the words for one value.
"""

from __future__ import annotations

__all__ = ["label", "tooltip", "choices", "choice_words", "STAGE_WORDS"]

#: key -> (label with unit, one line of meaning)
_FIELDS = {
    "design": ("Design", "the filter family: how the pass band and the edge trade off"),
    "order": ("Order", "number of poles; each order steepens the edge by 6 dB per octave"),
    "cutoff_hz": ("Cutoff (Hz)", "the edge frequency of the stage"),
    "ripple_db": ("Pass-band ripple (dB)", "how much the gain may wave inside the pass band"),
    "stop_db": ("Stop-band attenuation (dB)", "the least attenuation outside the band"),
    "band_hz": ("Band (Hz)", "low and high edges, separated by a comma: 1200, 1550"),
    "gain_db": ("Gain (dB)", "a flat gain applied by the stage"),
    "at_hz": ("Notch at (Hz)", "the frequency taken out, usually the mains"),
    "harmonics": ("Harmonics notched", "how many multiples of the notch frequency are taken "
                                       "out (1: the fundamental only)"),
    "q": ("Notch Q", "sharpness: notch frequency over its -3 dB width"),
    "response": ("Response", "which side the RC network lets through"),
    "r_ohm": ("Resistor R (Ω)", "per section; SI prefixes work: 10k, 4k7"),
    "c_farad": ("Capacitor C (F)", "per section; SI prefixes work: 22n, 4n7, 1u"),
    "sections": ("Sections", "identical RC sections in a row"),
    "buffered": ("Between sections", "buffered sections multiply; a loaded ladder "
                                     "interacts as the bare parts would"),
    "type": ("Detector", "how the chain turns its output into a strength"),
    "time_constant_s": ("Time constant (s)", "the detector's averaging: longer is quieter "
                                             "but follows the target more slowly"),
    "slope_db_oct": ("Slope (dB/oct)", "the detector's low-pass roll-off: 6 dB/oct per "
                                       "first-order section"),
    "noise_window_s": ("Noise window (s)", "how much recent output the noise estimate uses"),
    "frequency_hz": ("Reference frequency (Hz)", "the frequency the light source is switched "
                                                 "at; every lock-in listens there"),
    "phase_deg": ("Phase (°)", "phase of the internal reference against the source"),
    "channel": ("Reference channel", "input channel that carries the measured reference"),
    "waveform": ("Reference waveform", "shape of the measured reference signal"),
    "lock_range": ("Lock range", "how far a measured reference may wander, as a fraction"),
}

#: the reference table's ``type`` would clash with the detector's: contexts keep them apart
_CONTEXT_FIELDS = {("stage", "type"): ("Stage type", "what the stage does")}

_CHOICES = {
    "design": [("butterworth", "Butterworth"), ("bessel", "Bessel"),
               ("chebyshev1", "Chebyshev type I"), ("chebyshev2", "Chebyshev type II"),
               ("elliptic", "Elliptic")],
    "stage": [("lowpass", "Low-pass"), ("highpass", "High-pass"), ("bandpass", "Band-pass"),
              ("bandstop", "Band-stop"), ("notch", "Notch"), ("rc", "RC network (analog parts)")],
    "response": [("lowpass", "Low-pass"), ("highpass", "High-pass")],
    "detector": [("lockin", "Lock-in"), ("rms", "Band power (RMS)")],
    "slope": [(6, "6 dB/oct"), (12, "12 dB/oct"), (18, "18 dB/oct"), (24, "24 dB/oct")],
    "waveform": [("square", "Square"), ("sine", "Sine")],
}

#: stage type -> its words, for titles and the "add stage" list
STAGE_WORDS = dict(_CHOICES["stage"])


def label(key: str, context: str = "") -> str:
    """The label shown beside ``key``'s field, with its unit."""
    entry = _CONTEXT_FIELDS.get((context, key)) or _FIELDS.get(key)
    return entry[0] if entry else key.replace("_", " ").capitalize()


def tooltip(key: str, context: str = "") -> str:
    """What the field means, then the config key it writes."""
    entry = _CONTEXT_FIELDS.get((context, key)) or _FIELDS.get(key)
    meaning = f"{entry[1][0].upper()}{entry[1][1:]}.\n" if entry else ""
    return f"{meaning}Config key: {key}"


def choices(kind: str) -> list[tuple[object, str]]:
    """``[(config value, words), ...]`` for the drop-down of ``kind``."""
    return list(_CHOICES[kind])


def choice_words(kind: str, value) -> str:
    """The words for one config value (the value itself if it has none)."""
    return dict(_CHOICES.get(kind, ())).get(value, str(value))
