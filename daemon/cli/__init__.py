"""The command line: ``sigmad run``, ``send``, ``demo``, ``check-config``, ``inspect``,
``keygen`` and ``bench``."""
