"""Before and after a bench day: reports computed from settings and recorded
runs (range, design, survey, check, tune). Built on :mod:`livefilt.stream`,
:mod:`livefilt.runs` and :mod:`livefilt.dsp`; never imported by them."""
