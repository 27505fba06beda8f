"""Input drivers, one module each, registered in the ``livefilt.drivers`` entry-point group.

- ``simulated``: the built-in greenhouse canopy-height bench (default, seeded).
- ``file``: WAV files and recorded run folders.
- ``soundcard``: any PortAudio input through sounddevice (optional modulation drive).
- ``serialport``: a microcontroller ADC streaming our framed protocol (``wire``) or text.

Nothing here is imported until a driver is chosen.
"""
