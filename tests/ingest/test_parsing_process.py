"""What a parsing process loads: the reader and the object store, never the catalog, the
data-frame library or linear algebra (each would add to the start-up of every load)."""

from __future__ import annotations

import subprocess
import sys

from archive.ingest.workers import _SAMPLE

CODE = """
import sys
from archive.ingest import workers
workers.start(parent=__import__('os').getppid(), warm_up=True, main_thread=False)
workers.ready()
from archive.ingest.nmea import parse_nmea
res = parse_nmea(workers._SAMPLE, node="KF-0001", raw_hash="0" * 64)
print(res.fixes.num_rows, res.fixes.column("lat")[0].as_py())
print(sorted(m for m in ("pandas", "scipy.linalg", "sqlalchemy", "archive.store.archive")
             if m in sys.modules))
"""


def test_a_parsing_process_loads_the_reader_and_nothing_heavy():
    out = subprocess.run([sys.executable, "-c", CODE], capture_output=True, text=True,
                         check=True).stdout.splitlines()
    # DePriest's GGA example (NMEA 0183 sentence reference, gpsinformation.org): 4807.038 N
    # is 48 + 7.038 / 60 degrees
    n, lat = out[0].split()
    assert int(n) == 1 and abs(float(lat) - (48 + 7.038 / 60)) < 1e-9
    assert out[1] == "[]"
    assert b"$GPGGA" in _SAMPLE


def test_skipping_the_blas_probe_leaves_later_imports_working():
    code = ("import sys; from archive.ingest import workers; workers.skip_blas_probe(); "
            "import numba.np.arraymath as m; print(getattr(m, '_HAVE_BLAS', False)); "
            "import scipy.linalg; print(scipy.linalg.cython_blas is not None)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.split()
    assert out == ["False", "True"]
