"""nodekeep: receiver positions from seismic node GPS logs, kept with their chain of custody.

The import package is ``archive``; the command is ``nodekeep``. Layers, from the bottom:
``store`` (catalog, objects, ledger) < ``ingest`` / ``survey`` < ``solve`` / ``qc`` /
``deliver`` < ``cli``. Every layer is usable as a library.
"""

__version__ = "0.2.0"
