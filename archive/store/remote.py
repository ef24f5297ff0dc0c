"""Object stores that are not a local folder: the pyarrow filesystem of an object store URL."""

from __future__ import annotations

import os
from urllib.parse import urlsplit

import pyarrow.fs as pafs


def remote_filesystem(url: str) -> tuple[pafs.FileSystem, str]:
    """The pyarrow filesystem and base path of a non-local object store URL.

    For ``s3://bucket/prefix`` on an S3-compatible service other than AWS, the endpoint
    comes from ``AWS_ENDPOINT_URL_S3`` or ``AWS_ENDPOINT_URL`` (``http://host:port`` or
    ``https://host``), the region from ``AWS_REGION`` or ``AWS_DEFAULT_REGION``; credentials
    come from the AWS SDK's usual chain (``AWS_ACCESS_KEY_ID`` / ``AWS_SECRET_ACCESS_KEY`` /
    ``AWS_SESSION_TOKEN``, then profile files and instance roles). Without an endpoint, or
    when the URL carries its own query options, pyarrow resolves the URL itself.
    """
    parts = urlsplit(url)
    endpoint = os.environ.get("AWS_ENDPOINT_URL_S3") or os.environ.get("AWS_ENDPOINT_URL")
    if parts.scheme != "s3" or not endpoint or parts.query:
        return pafs.FileSystem.from_uri(url)
    ep = urlsplit(endpoint if "://" in endpoint else f"https://{endpoint}")
    options: dict[str, str] = {"endpoint_override": ep.netloc, "scheme": ep.scheme or "https"}
    region = os.environ.get("AWS_REGION") or os.environ.get("AWS_DEFAULT_REGION")
    if region:
        options["region"] = region
    return pafs.S3FileSystem(**options), f"{parts.netloc}{parts.path}".rstrip("/")
