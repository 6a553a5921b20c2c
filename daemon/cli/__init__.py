"""The command line: ``sigmad run``, ``send``, ``demo``, ``validate``, ``inspect``,
``keygen`` and ``bench``."""
