"""Reading secret files only when they are private, and writing files owner-only and atomically.

Theory of operation: a node's secrets — its TLS private key, its log-signing key, the key-hashing secret — live in
files. :func:`read_secret_file` opens the file first and checks the *opened* file (``fstat``, so a swap between
check and read cannot slip past): it must be a regular file with no permission bits for group or others (the rule
ssh applies to private keys); otherwise it refuses with an error naming the file and its mode — never its content.
Symbolic links are followed (secret mounts often use them); the check is on the target.

:func:`write_private_file` writes a temporary file in the same directory (``O_CREAT | O_EXCL``, mode 0600, then
``fchmod`` to 0600 whatever the umask), fsyncs it, and moves it into place: by ``link`` when it must not overwrite
(atomic: fails if the name exists), by ``rename`` otherwise; then fsyncs the directory. A reader sees either no
file or the whole file, and never a moment where the file is readable by others. :func:`ensure_private_dir`
creates every missing directory of a path with mode 0700 (set explicitly, whatever the umask), and leaves
directories that already exist as they are.
"""

from __future__ import annotations

import contextlib
import errno
import os
import stat
from pathlib import Path

MAX_SECRET_BYTES = 1 << 20
PRIVATE_MODE = 0o600
PRIVATE_DIR_MODE = 0o700


class SecretFileError(Exception):
    """A secret file that may not be used or written; the message names the file, never its content."""


def _mode(mode: int) -> str:
    return f"{stat.S_IMODE(mode):04o}"


def read_secret_file(path: str | os.PathLike[str], what: str) -> bytes:
    """The bytes of ``path`` if it is a regular file no one but its owner can read, write or execute."""
    p = Path(path)
    try:
        fd = os.open(p, os.O_RDONLY | os.O_CLOEXEC | os.O_NOCTTY | os.O_NONBLOCK)
    except FileNotFoundError:
        raise SecretFileError(f"{what} {p}: no such file") from None
    except OSError as exc:
        raise SecretFileError(f"{what} {p}: cannot open ({exc.strerror})") from None
    try:
        info = os.fstat(fd)
        if not stat.S_ISREG(info.st_mode):
            raise SecretFileError(f"{what} {p}: not a regular file")
        if info.st_mode & 0o077:
            raise SecretFileError(
                f"{what} {p}: mode {_mode(info.st_mode)} lets group or others access it; run: chmod 600 {p}"
            )
        if info.st_size > MAX_SECRET_BYTES:
            raise SecretFileError(f"{what} {p}: {info.st_size} bytes is too large for a secret file")
        chunks = []
        total = 0
        while True:
            chunk = os.read(fd, 65536)
            if not chunk:
                break
            total += len(chunk)
            if total > MAX_SECRET_BYTES:
                raise SecretFileError(f"{what} {p}: too large for a secret file")
            chunks.append(chunk)
        return b"".join(chunks)
    finally:
        os.close(fd)


def check_private_file(path: str | os.PathLike[str], what: str) -> None:
    """Refuse (``SecretFileError``) if an existing file is accessible by group or others."""
    p = Path(path)
    try:
        info = p.stat()
    except OSError as exc:
        raise SecretFileError(f"{what} {p}: cannot read its status ({exc.strerror})") from None
    if info.st_mode & 0o077:
        raise SecretFileError(f"{what} {p}: mode {_mode(info.st_mode)} lets group or others access it")


def _fsync_dir(directory: Path) -> None:
    fd = os.open(directory, os.O_RDONLY | os.O_DIRECTORY | os.O_CLOEXEC)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def write_private_file(path: str | os.PathLike[str], data: bytes, *, overwrite: bool = False) -> Path:
    """Write ``data`` to ``path`` with mode 0600, atomically; refuse an existing file unless ``overwrite``."""
    target = Path(path)
    directory = target.parent
    tmp = directory / f".{target.name}.{os.urandom(8).hex()}.tmp"
    try:
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_CLOEXEC, PRIVATE_MODE)
    except OSError as exc:
        raise SecretFileError(f"{target}: cannot create a file in {directory} ({exc.strerror})") from None
    try:
        try:
            os.fchmod(fd, PRIVATE_MODE)
            view = memoryview(data)
            while view:
                view = view[os.write(fd, view) :]
            os.fsync(fd)
        finally:
            os.close(fd)
        if overwrite:
            os.replace(tmp, target)
        else:
            try:
                os.link(tmp, target)
            except FileExistsError:
                raise SecretFileError(f"{target}: already exists; refusing to overwrite it") from None
            except OSError as exc:
                if exc.errno not in (errno.EPERM, errno.ENOTSUP, errno.EOPNOTSUPP, errno.EXDEV):
                    raise
                # No hard links on this file system: check, then rename (not atomic against a racing writer).
                if target.exists():
                    raise SecretFileError(f"{target}: already exists; refusing to overwrite it") from None
                os.replace(tmp, target)
        _fsync_dir(directory)
    except OSError as exc:
        raise SecretFileError(f"{target}: cannot write ({exc.strerror})") from None
    finally:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
    return target


def ensure_private_dir(path: str | os.PathLike[str]) -> Path:
    """Create ``path`` and any missing parents, each with mode 0700 whatever the umask; existing ones are kept."""
    p = Path(path)
    if p.exists() and not p.is_dir():
        raise SecretFileError(f"{p}: exists and is not a directory")
    missing = []
    for directory in (p, *p.parents):
        if directory.exists():
            break
        missing.append(directory)
    for directory in reversed(missing):  # outermost first
        try:
            os.mkdir(directory, PRIVATE_DIR_MODE)
        except FileExistsError:
            if not directory.is_dir():
                raise SecretFileError(f"{directory}: exists and is not a directory") from None
            continue  # made meanwhile by someone else: not ours to change
        except OSError as exc:
            raise SecretFileError(f"{directory}: cannot create directory ({exc.strerror})") from None
        os.chmod(directory, PRIVATE_DIR_MODE)  # mkdir's mode is filtered by the umask
    return p
