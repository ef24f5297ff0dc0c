"""Objects on an S3-compatible service keep the store's guarantees.

Every test talks to a real server process (moto's standalone S3 server on loopback) through
the same code path a company bucket uses; boto3 is the independent side that looks at what
was actually stored, and ``hashlib`` the independent hash.
"""

from __future__ import annotations

import hashlib

import pyarrow as pa
import pytest

from archive.errors import IntegrityError, ReadOnly
from archive.store.archive import Archive
from archive.store.objects import ObjectStore
from archive.store.verify import verify_archive
from tests.support.cli import SURVEY_EPSG, SURVEY_NAME, invoke
from tests.support.scale import s3_key

GGA = b"$GPGGA,123519,4807.038,N,01131.000,E,1,08,0.9,545.4,M,46.9,M,,*47\r\n"


def test_put_names_the_object_by_sha256_at_its_fanout_key(s3_url, s3_env):
    store = ObjectStore(s3_url)
    assert not store.is_local and store.local_path("0" * 64) is None
    h, size = store.put_bytes(GGA)
    assert h == hashlib.sha256(GGA).hexdigest() and size == len(GGA)
    bucket, key = s3_key(s3_url, h)
    got = s3_env.client().get_object(Bucket=bucket, Key=key)["Body"].read()
    assert got == GGA
    assert store.exists(h) and store.size(h) == len(GGA)
    assert not store.exists(hashlib.sha256(b"never stored").hexdigest())
    assert store.read_bytes(h) == GGA and store.check(h)


def test_put_twice_never_rewrites_and_leaves_no_temporaries(s3_url, s3_env):
    store = ObjectStore(s3_url)
    h, _ = store.put_bytes(b"abc")
    bucket, key = s3_key(s3_url, h)
    client = s3_env.client()
    before = client.head_object(Bucket=bucket, Key=key)
    assert store.put_bytes(b"abc") == (h, 3)
    after = client.head_object(Bucket=bucket, Key=key)
    assert after["LastModified"] == before["LastModified"] and after["ETag"] == before["ETag"]
    keys = [o["Key"] for o in client.list_objects_v2(Bucket=bucket).get("Contents", [])]
    # pyarrow may leave an empty "tmp/" folder marker after deleting the upload; no bytes.
    assert [k for k in keys if not k.endswith("/")] == [key]
    assert list(store.iter_hashes()) == [h]


def test_tables_and_large_streams_round_trip(s3_url, tmp_path):
    store = ObjectStore(s3_url)
    t = pa.table({"node": ["N0001", "N0002"], "lat": [35.1, 35.2]})
    h, _ = store.put_table(t)
    assert store.read_table(h).equals(t)
    assert store.parquet_file(h).metadata.num_rows == 2
    big = tmp_path / "big.bin"
    big.write_bytes(bytes(range(256)) * 20_000)  # 5 MB: several 1 MiB chunks, multipart upload
    hb, size = store.put_file(big)
    assert hb == hashlib.sha256(big.read_bytes()).hexdigest() and size == 5_120_000
    assert store.check(hb)


def test_read_only_store_refuses_writes_and_missing_is_an_integrity_error(s3_url):
    store = ObjectStore(s3_url, read_only=True)
    with pytest.raises(ReadOnly):
        store.put_bytes(b"x")
    with pytest.raises(IntegrityError, match="missing"):
        store.open(hashlib.sha256(b"nothing").hexdigest())


def test_check_detects_bytes_changed_behind_the_store(s3_url, s3_env):
    store = ObjectStore(s3_url)
    h, _ = store.put_bytes(GGA)
    bucket, key = s3_key(s3_url, h)
    s3_env.client().put_object(Bucket=bucket, Key=key, Body=GGA.replace(b"545.4", b"545.5"))
    assert store.exists(h)
    assert not store.check(h)


def _add_logged_object(arc: Archive, data: bytes) -> str:
    h, size = arc.objects.put_bytes(data)
    with arc.transaction() as tx:
        arc.register_object(tx, h, size, "raw")
        arc.log(tx, "test.object", {"raw": h})
    return h


def test_archive_initialised_on_s3_verifies_and_names_tampering(tmp_path, s3_url, s3_env,
                                                                 runner):
    from archive.cli.main import cli

    root = tmp_path / "arc"
    result = runner.invoke(cli, ["init", str(root), "--objects", s3_url])
    assert result.exit_code == 0, result.output
    assert s3_url in result.output
    arc = Archive.open(root, actor="tester")
    try:
        from archive.survey.surveys import create_survey

        create_survey(arc, SURVEY_NAME, f"EPSG:{SURVEY_EPSG}")
        h1 = _add_logged_object(arc, GGA)
        h2 = _add_logged_object(arc, b"$GPRMC second log\r\n")
        assert arc.objects.read_bytes(h1) == GGA
        report = verify_archive(arc)
        assert report.ok, report.problems
        assert report.objects_checked == 2 and not report.dangling
        result = invoke(runner, root, "verify")
        assert result.exit_code == 0 and "archive OK" in result.output

        # An object written but never registered (an interrupted load) is dangling only.
        hd, _ = arc.objects.put_bytes(b"interrupted")
        report = verify_archive(arc)
        assert report.ok and report.dangling == [hd]

        # Bytes overwritten in the bucket: named hash-mismatch, exit code 3.
        client = s3_env.client()
        bucket, key = s3_key(s3_url, h1)
        client.put_object(Bucket=bucket, Key=key, Body=b"tampered")
        report = verify_archive(arc)
        assert [(p.kind, p.subject) for p in report.problems] == [
            ("hash-mismatch", f"object {h1}")]
        result = invoke(runner, root, "verify")
        assert result.exit_code == 3 and "hash-mismatch" in result.output

        # An object deleted from the bucket: named missing.
        client.delete_object(Bucket=bucket, Key=s3_key(s3_url, h2)[1])
        kinds = sorted(p.kind for p in verify_archive(arc).problems)
        assert kinds == ["hash-mismatch", "missing"]
    finally:
        arc.close()
