"""Runs on disk: run folders, their WAV samples and their markers
(:mod:`.record`, :mod:`.wavio`). Knows nothing of filters or the engine."""
