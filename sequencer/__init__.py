"""fieldrun sequencer: protocol language, plan compiler, engine, watchdog, recorder,
analysis, CLI and console."""

__version__ = "0.1.0"
