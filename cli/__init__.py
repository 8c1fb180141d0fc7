"""The ``cairn`` command line (installed as the ``cairn_cli`` package)."""
