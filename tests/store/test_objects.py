"""Object store: content addressing, idempotence, read-only files, streaming."""

from __future__ import annotations

import hashlib
import os
import stat

import pyarrow as pa
import pytest

from archive.errors import IntegrityError, ReadOnly
from archive.store.objects import ObjectStore, fanout


def test_put_bytes_is_named_by_sha256(tmp_path):
    store = ObjectStore(tmp_path / "o")
    data = b"$GPGGA,123519,4807.038,N,01131.000,E,1,08,0.9,545.4,M,46.9,M,,*47\r\n"
    h, size = store.put_bytes(data)
    # The name is the SHA-256 of the bytes, computed independently with hashlib.
    assert h == hashlib.sha256(data).hexdigest()
    assert size == len(data)
    assert store.read_bytes(h) == data
    path = store.local_path(h)
    assert path.relative_to(tmp_path / "o").as_posix() == f"{h[:2]}/{h[2:4]}/{h}"


def test_put_twice_is_a_no_op_and_objects_are_read_only(tmp_path):
    store = ObjectStore(tmp_path / "o")
    h1, _ = store.put_bytes(b"abc")
    mtime = os.stat(store.local_path(h1)).st_mtime_ns
    h2, _ = store.put_bytes(b"abc")
    assert h1 == h2
    assert os.stat(store.local_path(h1)).st_mtime_ns == mtime
    mode = os.stat(store.local_path(h1)).st_mode
    assert not mode & (stat.S_IWUSR | stat.S_IWGRP | stat.S_IWOTH)
    assert list(store.iter_hashes()) == [h1]
    assert not any((tmp_path / "o" / "tmp").iterdir())


def test_put_file_streams_large_file(tmp_path):
    big = tmp_path / "big.bin"
    block = os.urandom(1 << 16)
    with open(big, "wb") as fh:
        for _ in range(64):  # 4 MiB, several read chunks
            fh.write(block)
    store = ObjectStore(tmp_path / "o")
    h, size = store.put_file(big)
    assert size == 64 * len(block)
    assert h == hashlib.sha256(big.read_bytes()).hexdigest()
    assert store.check(h)


def test_tables_round_trip_and_check_detects_flipped_byte(tmp_path):
    store = ObjectStore(tmp_path / "o")
    t = pa.table({"a": [1, 2, 3], "b": ["x", "y", "z"]})
    h, _ = store.put_table(t)
    assert store.read_table(h).equals(t)
    p = store.local_path(h)
    os.chmod(p, 0o644)
    raw = bytearray(p.read_bytes())
    raw[10] ^= 0x01
    p.write_bytes(bytes(raw))
    assert not store.check(h)


def test_missing_object_and_read_only_store(tmp_path):
    store = ObjectStore(tmp_path / "o")
    with pytest.raises(IntegrityError, match="missing"):
        store.read_bytes("0" * 64)
    ro = ObjectStore(tmp_path / "o", read_only=True)
    with pytest.raises(ReadOnly, match="read-only"):
        ro.put_bytes(b"x")


def test_fanout_refuses_non_hash():
    with pytest.raises(ValueError):
        fanout("../../etc/passwd")


def _damage(store: ObjectStore, h: str) -> None:
    p = store.local_path(h)
    os.chmod(p, 0o644)
    raw = bytearray(p.read_bytes())
    raw[len(raw) // 2] ^= 0x01
    p.write_bytes(bytes(raw))


def test_parquet_is_parsed_from_memory_arrow_owns(tmp_path):
    # Arrow's reader threads may let go of a read's source a moment after the read returns;
    # a source over Python bytes then needs the interpreter, and a process already exiting
    # aborts ("terminate called without an active exception", Arrow issue 34314 shows the
    # same abort). The buffer must come from Arrow's own allocator: its count grows by the
    # object's size while the buffer lives (pyarrow.total_allocated_bytes).
    store = ObjectStore(tmp_path / "o")
    t = pa.table({"a": list(range(5000)), "b": [f"N{i % 7}" for i in range(5000)]})
    h, size = store.put_table(t)
    before = pa.total_allocated_bytes()
    buf = store.read_buffer(h)
    assert isinstance(buf, pa.Buffer) and buf.size == size
    assert pa.total_allocated_bytes() - before >= size
    assert hashlib.sha256(buf).hexdigest() == h
    del buf
    # the Parquet readers go through read_buffer, not through Python bytes
    store.read_bytes = _no_python_bytes
    assert store.read_table(h).equals(t)
    assert store.read_table(h, columns=["b"]).equals(t.select(["b"]))
    assert store.parquet_in_memory(h, read_dictionary=["b"]).read().column("b").to_pylist() \
        == t.column("b").to_pylist()


def _no_python_bytes(h: str) -> bytes:
    raise AssertionError(f"object {h[:12]} read into Python bytes for Parquet")


def test_damaged_or_missing_parquet_is_refused_before_parsing(tmp_path):
    store = ObjectStore(tmp_path / "o")
    h, _ = store.put_table(pa.table({"a": list(range(1000))}))
    _damage(store, h)
    for read in (store.read_buffer, store.read_table, store.parquet_in_memory):
        with pytest.raises(IntegrityError, match="no longer matches its hash"):
            read(h)
    for read in (store.read_buffer, store.read_table, store.parquet_in_memory):
        with pytest.raises(IntegrityError, match="missing"):
            read("1" * 64)


def test_read_buffer_through_a_filesystem_interface(tmp_path, monkeypatch):
    # The same read through pyarrow's filesystem layer (the path remote stores take), with
    # the local filesystem standing in for a bucket: the buffer is Arrow's there too (a
    # forward-only stream would have handed back Python bytes).
    import pyarrow.fs as pafs

    import archive.store.objects as objects

    local = ObjectStore(tmp_path / "o")
    t = pa.table({"x": [float(i) for i in range(4000)], "y": ["p", "q"] * 2000})
    h, size = local.put_table(t)
    monkeypatch.setattr(objects, "remote_filesystem",
                        lambda url: (pafs.LocalFileSystem(), str(tmp_path / "o")))
    remote = ObjectStore("s3://bucket/o")
    assert not remote.is_local
    before = pa.total_allocated_bytes()
    buf = remote.read_buffer(h)
    assert pa.total_allocated_bytes() - before >= size
    assert buf.to_pybytes() == local.local_path(h).read_bytes()
    del buf
    assert remote.read_table(h).equals(t)
    with pytest.raises(IntegrityError, match="missing"):
        remote.read_buffer("2" * 64)
