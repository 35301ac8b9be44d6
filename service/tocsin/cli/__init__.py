"""The ``tocsin`` command line. Each sub-command is one module with ``add_parser`` and ``run``."""
