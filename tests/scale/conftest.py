"""Fixtures for the scale tests: a real S3-compatible server process on loopback.

The server is moto's standalone server (``python -m moto.server``), started once per test
session on a free 127.0.0.1 port and stopped at the end. Each test gets a bucket of its own
and the standard AWS_* environment variables pointing at the server, the same variables a
crew sets for a company's S3-compatible service.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
import urllib.request
import uuid
from collections.abc import Iterator
from dataclasses import dataclass

import pytest

from tests.support.scale import free_port


@dataclass
class S3Server:
    """Where the test S3 server listens, and the environment that reaches it."""

    endpoint: str

    @property
    def env(self) -> dict[str, str]:
        return {
            "AWS_ENDPOINT_URL": self.endpoint,
            "AWS_ACCESS_KEY_ID": "nodekeep-test",
            "AWS_SECRET_ACCESS_KEY": "nodekeep-test-secret",
            "AWS_DEFAULT_REGION": "us-east-1",
        }

    def client(self):
        """A boto3 S3 client on the server (the independent side of the tests)."""
        import boto3

        return boto3.client("s3", endpoint_url=self.endpoint, region_name="us-east-1",
                            aws_access_key_id="nodekeep-test",
                            aws_secret_access_key="nodekeep-test-secret")


@pytest.fixture(scope="session")
def s3_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[S3Server]:
    """moto's standalone S3 server in its own process, for the whole session."""
    pytest.importorskip("moto.server")
    port = free_port()
    log = tmp_path_factory.mktemp("moto") / "server.log"
    with open(log, "wb") as out:
        proc = subprocess.Popen(
            [sys.executable, "-m", "moto.server", "-H", "127.0.0.1", "-p", str(port)],
            stdout=out, stderr=subprocess.STDOUT,
        )
    endpoint = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 30
        while True:
            try:
                urllib.request.urlopen(f"{endpoint}/moto-api/", timeout=1).close()
                break
            except OSError:
                if proc.poll() is not None or time.monotonic() > deadline:
                    raise RuntimeError(f"moto server did not start: {log.read_text()}") from None
                time.sleep(0.1)
        yield S3Server(endpoint)
    finally:
        proc.terminate()
        try:
            proc.wait(10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


@pytest.fixture
def s3_env(s3_server: S3Server, monkeypatch: pytest.MonkeyPatch) -> S3Server:
    """The AWS_* variables set to the test server for this test (and its subprocesses)."""
    for key in ("AWS_ENDPOINT_URL_S3", "AWS_REGION", "AWS_SESSION_TOKEN", "AWS_PROFILE"):
        monkeypatch.delenv(key, raising=False)
    for key, value in s3_server.env.items():
        monkeypatch.setenv(key, value)
    return s3_server


@pytest.fixture
def s3_url(s3_env: S3Server) -> str:
    """``s3://BUCKET/objects`` on a new, empty bucket."""
    bucket = f"nk-{uuid.uuid4().hex[:16]}"
    s3_env.client().create_bucket(Bucket=bucket)
    return f"s3://{bucket}/objects"


@pytest.fixture(autouse=True)
def _no_real_aws(monkeypatch: pytest.MonkeyPatch) -> None:
    """Never reach a real AWS account from these tests, whatever the machine's profile."""
    if "AWS_ENDPOINT_URL" not in os.environ:
        monkeypatch.setenv("AWS_EC2_METADATA_DISABLED", "true")


@pytest.fixture(scope="session")
def small_scenario(tmp_path_factory: pytest.TempPathFactory):
    """The invented Kestrel Flats 3D scenario at its "small" size, generated once."""
    from archive.seeds.scenario import generate

    return generate(tmp_path_factory.mktemp("kestrel"), seed=7, size="small")


