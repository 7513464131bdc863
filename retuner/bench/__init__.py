"""Figures for ``retuner bench``: :mod:`.performance` (the synthetic performances, also used by
the tests), :mod:`.timing` (engine latency and economy), :mod:`.progressions` (the adaptive
goals on the project's progressions) and :mod:`.files` (file conversion speed and memory)."""
