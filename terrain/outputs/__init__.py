"""What a run leaves behind: the output manifest, figures, and the writer.

:mod:`.manifest` lists every file each command writes (read by the
overwrite check, the writer and the help text); :mod:`.plot` draws figures;
:mod:`.writer` writes a finished run's layers, tables, figures and
provenance through :mod:`terrain.io`.
"""
