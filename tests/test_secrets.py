"""Secret files: read only when private to their owner; written owner-only, atomically, never clobbered silently."""

from __future__ import annotations

import os
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st
from jointstat.node.secrets import (
    SecretFileError,
    check_private_file,
    ensure_private_dir,
    read_secret_file,
    write_private_file,
)

CONTENT = b"hashing secret for the shared-donors job: 7f1c"


def test_an_owner_only_secret_is_read(tmp_path: Path) -> None:
    path = write_private_file(tmp_path / "hash.secret", CONTENT)
    assert read_secret_file(path, "key-hashing secret") == CONTENT


@given(st.integers(min_value=0, max_value=0o7), st.integers(min_value=0, max_value=0o7))
def test_any_permission_for_group_or_others_is_refused(
    tmp_path_factory: pytest.TempPathFactory, g: int, o: int
) -> None:
    path = tmp_path_factory.mktemp("s") / "key.pem"
    path.write_bytes(CONTENT)
    mode = 0o600 | (g << 3) | o
    os.chmod(path, mode)
    if g or o:
        with pytest.raises(
            SecretFileError, match=f"TLS key {path}: mode {mode:04o} lets group or others"
        ) as caught:
            read_secret_file(path, "TLS key")
        assert CONTENT.decode() not in str(caught.value)
        with pytest.raises(SecretFileError, match=f"mode {mode:04o}"):
            check_private_file(path, "TLS key")
    else:
        assert read_secret_file(path, "TLS key") == CONTENT
        check_private_file(path, "TLS key")


def test_the_refusal_says_how_to_fix_it(tmp_path: Path) -> None:
    path = tmp_path / "signing.pem"
    path.write_bytes(CONTENT)
    os.chmod(path, 0o644)
    with pytest.raises(SecretFileError, match=r"run: chmod 600 .*signing\.pem$"):
        read_secret_file(path, "signing key")


def test_a_symlink_is_judged_by_its_target(tmp_path: Path) -> None:
    private = write_private_file(tmp_path / "private.pem", CONTENT)
    public = tmp_path / "public.pem"
    public.write_bytes(CONTENT)
    os.chmod(public, 0o644)
    (tmp_path / "to-private").symlink_to(private)
    (tmp_path / "to-public").symlink_to(public)
    assert read_secret_file(tmp_path / "to-private", "signing key") == CONTENT
    with pytest.raises(SecretFileError, match="mode 0644"):
        read_secret_file(tmp_path / "to-public", "signing key")


def test_missing_files_and_directories_are_named(tmp_path: Path) -> None:
    with pytest.raises(SecretFileError, match=r"signing key .*absent\.pem: no such file"):
        read_secret_file(tmp_path / "absent.pem", "signing key")
    os.chmod(tmp_path, 0o700)
    with pytest.raises(SecretFileError, match="not a regular file"):
        read_secret_file(tmp_path, "signing key")


def test_oversized_files_are_not_secrets(tmp_path: Path) -> None:
    path = write_private_file(tmp_path / "big", b"x" * ((1 << 20) + 1))
    with pytest.raises(SecretFileError, match="too large"):
        read_secret_file(path, "signing key")


def test_written_files_are_owner_only_whatever_the_umask(tmp_path: Path) -> None:
    old = os.umask(0)
    try:
        path = write_private_file(tmp_path / "key.pem", CONTENT)
    finally:
        os.umask(old)
    assert path.stat().st_mode & 0o777 == 0o600
    assert path.read_bytes() == CONTENT
    assert [p.name for p in tmp_path.iterdir()] == ["key.pem"]  # no temporary file left behind


def test_an_existing_file_is_kept_unless_overwrite_is_asked(tmp_path: Path) -> None:
    path = write_private_file(tmp_path / "key.pem", CONTENT)
    with pytest.raises(SecretFileError, match="already exists; refusing to overwrite it"):
        write_private_file(path, b"new")
    assert path.read_bytes() == CONTENT
    write_private_file(path, b"new", overwrite=True)
    assert path.read_bytes() == b"new"
    assert path.stat().st_mode & 0o777 == 0o600
    assert [p.name for p in tmp_path.iterdir()] == ["key.pem"]


def test_overwriting_a_world_readable_file_leaves_an_owner_only_one(tmp_path: Path) -> None:
    path = tmp_path / "key.pem"
    path.write_bytes(b"old")
    os.chmod(path, 0o644)
    write_private_file(path, CONTENT, overwrite=True)
    assert path.stat().st_mode & 0o777 == 0o600


def test_writing_into_a_missing_directory_is_a_clear_error(tmp_path: Path) -> None:
    with pytest.raises(SecretFileError, match=r"cannot create a file in .*nowhere"):
        write_private_file(tmp_path / "nowhere" / "key.pem", CONTENT)


def test_private_directories_are_made_0700_and_a_file_in_the_way_is_refused(tmp_path: Path) -> None:
    made = ensure_private_dir(tmp_path / "a" / "keys")
    assert made.stat().st_mode & 0o777 == 0o700
    assert (tmp_path / "a").stat().st_mode & 0o777 == 0o700  # a parent it had to create too
    (tmp_path / "file").write_bytes(b"")
    with pytest.raises(SecretFileError, match="exists and is not a directory"):
        ensure_private_dir(tmp_path / "file")


@pytest.mark.parametrize("umask", [0o000, 0o022, 0o277])
def test_every_directory_it_creates_is_0700_whatever_the_umask_and_existing_ones_are_left_alone(
    tmp_path: Path, umask: int
) -> None:
    os.chmod(tmp_path, 0o755)  # an existing parent (think /var/lib) keeps its mode
    old = os.umask(umask)
    try:
        ensure_private_dir(tmp_path / "data" / "results" / "weekly")
    finally:
        os.umask(old)
    modes = {
        p.name: p.stat().st_mode & 0o777 for p in (tmp_path, tmp_path / "data", tmp_path / "data" / "results")
    }
    assert modes == {tmp_path.name: 0o755, "data": 0o700, "results": 0o700}
    assert (tmp_path / "data" / "results" / "weekly").stat().st_mode & 0o777 == 0o700
