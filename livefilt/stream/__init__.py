"""The one engine that serves live, headless and replay: source -> ring ->
chains (:mod:`.chain`) -> outputs (display :mod:`.taps`, recorder, read-out
rows). :mod:`.engine` owns the thread."""
