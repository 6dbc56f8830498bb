"""sha256_hex, sha256_file and text_hash against published vectors and hashlib."""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

import pytest

from pipeline.hashing import sha256_file, sha256_hex, text_hash

# Reference: NIST FIPS 180-4 "Secure Hash Standard" (SHA-256), with the expected digests taken
# from the NIST CSRC "Cryptographic Standards and Guidelines: Examples with Intermediate Values"
# document for SHA-256 (SHA256.pdf); the empty-string digest is the well-known value, from memory.
NIST_VECTORS = [
    (b"abc", "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"),
    (b"", "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"),
    (
        b"abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq",
        "248d6a61d20638b8e5c026930c3e6039a33ce45964ff2167f6ecedd419db06c1",
    ),
]


@pytest.mark.parametrize(("message", "expected"), NIST_VECTORS)
def test_sha256_hex_matches_nist_example_vectors(message: bytes, expected: str) -> None:
    # Source: NIST FIPS 180-4 / NIST CSRC SHA-256 example values (see NIST_VECTORS).
    assert sha256_hex(message) == expected


def test_str_is_hashed_as_its_utf8_bytes() -> None:
    # "abc" as text must give the FIPS 180-4 digest of the bytes b"abc".
    assert sha256_hex("abc") == NIST_VECTORS[0][1]
    text = "Marrowby Cycle Works: Drehmoment 5 N·m, ½ turn, ✓"
    assert sha256_hex(text) == hashlib.sha256(text.encode("utf-8")).hexdigest()
    assert sha256_hex(text) != hashlib.sha256(text.encode("utf-16")).hexdigest()


def test_text_hash_is_sha256_of_the_exact_string() -> None:
    assert text_hash("abc") == NIST_VECTORS[0][1]
    # No normalisation: a trailing space or a case change names another vector.
    assert text_hash("Rear hub") != text_hash("Rear hub ")
    assert text_hash("Rear hub") != text_hash("rear hub")


@pytest.mark.parametrize("bufsize", [1, 7, 64, 4096, 1 << 20])
@pytest.mark.parametrize("extra", [-1, 0, 1])
def test_sha256_file_streams_across_buffer_boundaries(
    tmp_path: Path, bufsize: int, extra: int
) -> None:
    # File sizes straddle exact multiples of the buffer, where an off-by-one would drop or repeat
    # a block. Reference: hashlib over the whole bytes at once.
    size = max(0, 3 * bufsize + extra) if bufsize < 4096 else 2 * bufsize + extra
    payload = os.urandom(size)
    path = tmp_path / "service-manual.bin"
    path.write_bytes(payload)
    assert sha256_file(path, bufsize=bufsize) == hashlib.sha256(payload).hexdigest()


def test_sha256_file_of_empty_file_is_the_empty_digest(tmp_path: Path) -> None:
    path = tmp_path / "empty.txt"
    path.write_bytes(b"")
    # Source: NIST empty-message SHA-256 value (from memory; also checked against hashlib).
    assert sha256_file(path) == NIST_VECTORS[1][1] == hashlib.sha256(b"").hexdigest()


def test_sha256_file_matches_the_nist_vector_written_to_disk(tmp_path: Path) -> None:
    path = tmp_path / "abc.txt"
    path.write_bytes(NIST_VECTORS[2][0])
    # Source: NIST FIPS 180-4 448-bit example; bufsize 5 forces many partial reads.
    assert sha256_file(path, bufsize=5) == NIST_VECTORS[2][1]


def test_sha256_file_rejects_a_non_positive_buffer(tmp_path: Path) -> None:
    path = tmp_path / "x"
    path.write_bytes(b"x")
    with pytest.raises(ValueError):
        sha256_file(path, bufsize=0)
