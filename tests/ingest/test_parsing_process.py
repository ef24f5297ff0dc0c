"""What a parsing process loads: the reader and the object store, never the catalog, the
data-frame library or linear algebra (each would add to the start-up of every load)."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
from archive.seeds.nmea_write import write_nmea

from archive.ingest.workers import _SAMPLE

CODE = """
import sys
from archive.ingest import workers
workers.start(parent=__import__('os').getppid(), warm_up=True, main_thread=False)
workers.ready()
from archive.ingest.nmea import parse_nmea
res = parse_nmea(workers._SAMPLE, node="KF-0001", raw_hash="0" * 64)
print(res.fixes.num_rows, res.fixes.column("lat")[0].as_py())
# a log of many epochs, held in memory and streamed from a file (its fixes sorted, its
# tables written): still nothing heavy
from archive.ingest.parse_file import parse_file
log = sys.argv[1]
res = parse_nmea(open(log, "rb").read(), node="KF-0001", raw_hash="0" * 64)
out = parse_file({"objects_url": sys.argv[2], "path": log, "format": "nmea",
                  "node": "KF-0001", "small_file": 0, "sync": False})
print(res.fixes.num_rows, out["ok"], out["status"], out["n_fixes"])
print(sorted(m for m in ("pandas", "scipy.linalg", "sqlalchemy", "archive.store.archive")
             if m in sys.modules))
"""


def test_a_parsing_process_loads_the_reader_and_nothing_heavy(tmp_path):
    n = 600
    t = np.datetime64("2024-03-01T00:00:00", "us") + np.arange(n) * np.timedelta64(1, "s")
    log = tmp_path / "KF-0001.nmea"
    log.write_bytes(write_nmea(t, np.full(n, 35.2), np.full(n, -101.8), np.full(n, 900.0),
                               np.full(n, -24.0), np.ones(n, int), np.full(n, 9),
                               np.full(n, 1.1), np.full(n, 1.9), np.full(n, 1.5), gsa=True))
    (tmp_path / "objects").mkdir()
    out = subprocess.run([sys.executable, "-c", CODE, str(log), str(tmp_path / "objects")],
                         capture_output=True, text=True, check=True).stdout.splitlines()
    # DePriest's GGA example (NMEA 0183 sentence reference, gpsinformation.org): 4807.038 N
    # is 48 + 7.038 / 60 degrees
    k, lat = out[0].split()
    assert int(k) == 1 and abs(float(lat) - (48 + 7.038 / 60)) < 1e-9
    assert out[1].split() == [str(n), "True", "parsed", str(n)]
    assert out[2] == "[]"
    assert b"$GPGGA" in _SAMPLE


def test_skipping_the_blas_probe_leaves_later_imports_working():
    code = ("import sys; from archive.ingest import workers; workers.skip_blas_probe(); "
            "import numba.np.arraymath as m; print(getattr(m, '_HAVE_BLAS', False)); "
            "import scipy.linalg; print(scipy.linalg.cython_blas is not None)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.split()
    assert out == ["False", "True"]
