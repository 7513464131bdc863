"""The output modes, one module each, and the one table that names them.

The command line's ``--mode`` choices, config validation
(:meth:`retuner.engine.config.EngineConfig.validate`), the engine and file
conversion all read :data:`MODES`. Adding a mode is one module with a subclass of
:class:`~retuner.engine.outputs.base.OutputMode` plus one entry here.
"""

from __future__ import annotations

from retuner.engine.outputs.base import OutputMode
from retuner.engine.outputs.mpe import MPEMode
from retuner.engine.outputs.mts import MTSMode
from retuner.engine.outputs.pool import PoolMode

#: mode name -> class; the first entry is the default
MODES: dict[str, type[OutputMode]] = {m.name: m for m in (PoolMode, MPEMode, MTSMode)}

__all__ = ["MODES", "OutputMode", "PoolMode", "MPEMode", "MTSMode"]
