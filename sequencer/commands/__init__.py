"""One module per CLI verb. Each defines ``HELP`` (one line), ``add_arguments(parser)`` and
``run(args) -> int`` (the exit code). ``sequencer.cli`` lists them in ``VERBS``."""
