"""Signal processing, knowing nothing of drivers, files, threads or Qt.

Filter design from settings (:mod:`.design`), stateful second-order sections
(:mod:`.sections`), compiled per-sample kernels (:mod:`.kernels`) and the
detectors (:mod:`.detect`). Imports only :mod:`livefilt.errors` and the
foundation modules beside it.
"""
