"""Whole-or-nothing writes and the sha256 of a file (lshjob/core/atomic.py)."""

from __future__ import annotations

import hashlib
import os

import polars as pl
import pytest

from lshjob.core.atomic import atomic_file, file_sha256, staged_folder


class Interrupted(Exception):
    pass


def test_a_write_that_raises_leaves_no_file_and_no_temporary_name(tmp_path):
    # Oracle: os.listdir of the folder before and after.
    (tmp_path / "kept.txt").write_text("kept\n")
    before = sorted(os.listdir(tmp_path))
    with pytest.raises(Interrupted), atomic_file(tmp_path / "new.parquet") as tmp:
        pl.DataFrame({"a": [1, 2, 3]}).write_parquet(tmp)
        assert tmp.parent == tmp_path and tmp.suffix == ".parquet" and tmp.exists()
        raise Interrupted
    assert sorted(os.listdir(tmp_path)) == before


def test_a_write_that_raises_keeps_the_old_file_byte_for_byte(tmp_path):
    # Oracle: the bytes read before the failed write, and os.listdir.
    target = tmp_path / "index.txt"
    target.write_bytes(b"old contents\n")
    with pytest.raises(Interrupted), atomic_file(target) as tmp:
        tmp.write_bytes(b"new con")
        raise Interrupted
    assert target.read_bytes() == b"old contents\n"
    assert os.listdir(tmp_path) == ["index.txt"]


def test_a_clean_write_replaces_the_target_and_leaves_only_it(tmp_path):
    # Oracle: the bytes written, read back with open(); os.listdir.
    target = tmp_path / "index.txt"
    target.write_bytes(b"old\n")
    with atomic_file(target) as tmp:
        assert target.read_bytes() == b"old\n"  # not in place before the block ends
        tmp.write_bytes(b"new\n")
    with open(target, "rb") as fh:
        assert fh.read() == b"new\n"
    assert os.listdir(tmp_path) == ["index.txt"]


def test_a_staged_folder_appears_whole_or_not_at_all(tmp_path):
    # Oracle: os.listdir before/after, and the files read back.
    before = sorted(os.listdir(tmp_path))
    with pytest.raises(Interrupted), staged_folder(tmp_path / "parts", fsync=False) as tmp:
        (tmp / "a=1").mkdir()
        (tmp / "a=1" / "data.parquet").write_bytes(b"x")
        raise Interrupted
    assert sorted(os.listdir(tmp_path)) == before
    with staged_folder(tmp_path / "parts") as tmp:
        (tmp / "a=1").mkdir()
        (tmp / "a=1" / "data.parquet").write_bytes(b"x")
    assert sorted(os.listdir(tmp_path)) == sorted([*before, "parts"])
    assert (tmp_path / "parts" / "a=1" / "data.parquet").read_bytes() == b"x"


@pytest.mark.parametrize("size", [0, 1, 65_536, 3 * (1 << 20) + 7])
def test_file_sha256_equals_hashlib_over_the_bytes(tmp_path, size):
    # Oracle: hashlib.sha256 over the whole byte string in memory.
    data = os.urandom(size)
    path = tmp_path / "blob.bin"
    path.write_bytes(data)
    assert file_sha256(path) == hashlib.sha256(data).hexdigest()


def test_file_sha256_of_the_empty_file_is_the_published_value(tmp_path):
    # Oracle: FIPS 180-4 test vector, sha256 of the empty message (value from memory).
    path = tmp_path / "empty"
    path.write_bytes(b"")
    assert file_sha256(path) == "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"
