"""Sub-commands of the ``retuner`` command line; one module each (see retuner.cli)."""
