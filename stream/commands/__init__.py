"""Sub-commands of ``phasefree``; each module has ``HELP``, ``add_arguments`` and ``main``."""
