"""decode_body: identity, gzip (checked against Python's gzip module), bombs and refusals."""

from __future__ import annotations

import gzip
import os
import tracemalloc
import zlib

import pytest

from service.ingest import IngestError, Limits, decode_body

LIMITS = Limits(max_body_bytes=4 * 1024 * 1024)


@pytest.mark.parametrize("encoding", [None, "", "identity", "IDENTITY"])
def test_identity_passes_bytes_through(encoding):
    assert decode_body(b"id,pred\na,1\n", encoding, limits=LIMITS) == b"id,pred\na,1\n"


@pytest.mark.parametrize("encoding", ["gzip", "GZip", " gzip ", "x-gzip", "identity, gzip"])
@pytest.mark.parametrize("payload", [b"a", b"\x00" * 3_000_000, os.urandom(200_000)])
def test_gzip_matches_the_gzip_module(encoding, payload):
    raw = gzip.compress(payload, compresslevel=9)
    # reference: Python's gzip module (RFC 1952)
    assert decode_body(raw, encoding, limits=LIMITS) == gzip.decompress(raw) == payload


def test_several_gzip_members_are_one_body():
    raw = gzip.compress(b"id,pred\n") + gzip.compress(b"a,1\n") + gzip.compress(b"b,2\n")
    # reference: RFC 1952 section 2.2 (a gzip file is a series of members); gzip module
    assert decode_body(raw, "gzip", limits=LIMITS) == gzip.decompress(raw)


@pytest.mark.parametrize("raw", [b"", gzip.compress(b"", mtime=0)])
def test_empty_body_is_400(raw):
    encoding = "gzip" if raw else None
    err = pytest.raises(IngestError, decode_body, raw, encoding, limits=LIMITS).value
    assert err.status == 400 and err.field == "body" and "empty" in err.message


def _broken_gzip() -> dict[str, bytes]:
    good = gzip.compress(b"id,pred\n" * 1000)
    bad_crc = bytearray(good)
    bad_crc[-6] ^= 0xFF  # inside the CRC-32 trailer
    return {
        "not gzip": b"id,pred\na,1\n",
        "truncated": good[: len(good) // 2],
        "header only": good[:10],
        "bad checksum": bytes(bad_crc),
        "trailing garbage": good + b"garbage",
    }


@pytest.mark.parametrize("name", list(_broken_gzip()))
def test_broken_gzip_is_400(name):
    raw = _broken_gzip()[name]
    # reference: the gzip module refuses the same bytes
    with pytest.raises((OSError, EOFError, zlib.error)):
        gzip.decompress(raw)
    err = pytest.raises(IngestError, decode_body, raw, "gzip", limits=LIMITS).value
    assert err.status == 400 and err.field == "body"


def _bomb(unpacked_mib: int) -> bytes:
    packer = zlib.compressobj(9, zlib.DEFLATED, 16 + zlib.MAX_WBITS)
    zeros = b"\x00" * (1 << 20)
    parts = [packer.compress(zeros) for _ in range(unpacked_mib)]
    return b"".join(parts) + packer.flush()


def test_gzip_bomb_is_stopped_early_with_413():
    bomb = _bomb(256)  # 256 MiB of zeros in about 250 KiB
    assert len(bomb) < 1 << 20
    tracemalloc.start()
    try:
        with pytest.raises(IngestError) as info:
            decode_body(bomb, "gzip", limits=Limits(max_body_bytes=1 << 20))
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert info.value.status == 413 and info.value.field == "body"
    assert str(1 << 20) in info.value.message
    assert peak < 16 << 20  # never more than the limit plus a few 1 MiB pieces


def test_body_at_the_limit_passes_and_one_byte_more_is_413():
    limits = Limits(max_body_bytes=1000)
    assert decode_body(gzip.compress(b"x" * 1000), "gzip", limits=limits) == b"x" * 1000
    err = pytest.raises(IngestError, decode_body, gzip.compress(b"x" * 1001), "gzip",
                        limits=limits).value
    assert err.status == 413
    err = pytest.raises(IngestError, decode_body, b"x" * 1001, None, limits=limits).value
    assert err.status == 413


@pytest.mark.parametrize("encoding", ["br", "deflate", "compress", "gzip, gzip", "zstd"])
def test_other_content_codings_are_415(encoding):
    err = pytest.raises(IngestError, decode_body, b"abc", encoding, limits=LIMITS).value
    # reference: RFC 9110 section 15.5.16 (415 for an unsupported content coding)
    assert err.status == 415 and err.field == "Content-Encoding"
