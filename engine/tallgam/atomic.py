"""Outputs that appear whole or not at all, and temporary files a later run can clean up.

Every output tallgam writes (model files, relativity tables, HTML reports, scored Parquet,
the command line's validation tables) is written under a temporary name in its own folder,
flushed to disk (fsync) and renamed over the final name (:func:`replacing`): a crash, a kill
or a full disk leaves the earlier file or none, never half a file. Outputs are created with
mode 0666 (folders 0777) less the process's umask, as other programs create files, so under
umask 022 colleagues can read them (``-rw-r--r--``). Scratch copies of the data (spooled
readers, binned-fit scratch folders, hold-out scores) stay private to their owner (0600/0700).

Temporary names carry their owner: ``[.]tallgam-<kind>-<pid>-<host>-<token>...``, <host>
a short hash of the host name. A process killed by SIGKILL cannot remove its temporary files
and folders; the next run that creates one in the same folder removes those whose owner no
longer runs on this host (:func:`remove_stale`). Owners on other hosts (a shared file system)
are left alone: whether they still run cannot be seen from here.

File-system faults become :class:`~tallgam.errors.OutputError` naming the path and the reason.
"""

from __future__ import annotations

import contextlib
import errno
import hashlib
import os
import re
import secrets
import shutil
import socket
import tempfile
from collections.abc import Iterator

from tallgam.errors import OutputError, clip

_OWNED = re.compile(r"\.?tallgam-[a-z]+-(\d+)-([0-9a-f]{8})-[0-9a-f]{8}")
_ERRNO_IN_TEXT = re.compile(r"errno (\d+)", re.IGNORECASE)
_REASONS = {
    errno.ENOSPC: "the disk holding it is full",
    errno.EDQUOT: "the disk quota of this user is used up",
    errno.EFBIG: "the file would exceed the largest file size allowed to this process "
                 "(ulimit -f) or file system",
    errno.EACCES: "no permission to write there",
    errno.EPERM: "no permission to write there",
    errno.EROFS: "the file system is read-only",
    errno.EISDIR: "it is a folder",
    errno.ENOTDIR: "a part of the path is a file, not a folder",
    errno.ENOENT: "its folder does not exist (any more)",
    errno.ENAMETOOLONG: "the name is too long",
}
_ADVICE = {
    errno.ENOSPC: "free space or write elsewhere",
    errno.EDQUOT: "free space or write elsewhere",
    errno.EFBIG: "raise the limit or write elsewhere",
    errno.EACCES: "choose a folder you may write to",
    errno.EPERM: "choose a folder you may write to",
    errno.EROFS: "write elsewhere",
}


def host_tag() -> str:
    """Eight hex digits naming this host in temporary names."""
    return hashlib.sha1(socket.gethostname().encode("utf-8", "replace")).hexdigest()[:8]


def owned_name(kind: str, suffix: str = "", *, hidden: bool = True) -> str:
    """A fresh temporary name of this process: ``[.]tallgam-<kind>-<pid>-<host>-<token><suffix>``
    (``kind``: lower-case letters, e.g. ``"out"``, ``"score"``, ``"scratch"``)."""
    if not re.fullmatch(r"[a-z]+", kind):
        raise ValueError(f"kind must be lower-case letters, got {kind!r}")
    dot = "." if hidden else ""
    return f"{dot}tallgam-{kind}-{os.getpid()}-{host_tag()}-{secrets.token_hex(4)}{suffix}"


def process_running(pid: int) -> bool:
    """Whether process ``pid`` of this host still runs (a zombie, killed but not yet reaped
    by its parent, does not). Unknown cases count as running, so nothing live is removed."""
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:  # PermissionError: another user's process, alive
        return True
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii", errors="replace") as fh:
            state = fh.read().rsplit(")", 1)[1].split()[0]
    except (OSError, IndexError):
        return True
    return state not in ("Z", "X")


def is_stale(name: str) -> bool:
    """True for a temporary name of a process of this host that no longer runs."""
    m = _OWNED.match(name)
    return bool(m) and m.group(2) == host_tag() and not process_running(int(m.group(1)))


def remove_stale(folder: str | os.PathLike) -> list[str]:
    """Remove the temporary files and folders in ``folder`` left by dead processes of this
    host (see the module notes); returns their paths. Anything that cannot be removed (gone
    meanwhile, another user's) is left as it is."""
    removed = []
    try:
        entries = list(os.scandir(folder))
    except OSError:
        return removed
    for entry in entries:
        if not entry.name.lstrip(".").startswith("tallgam-") or not is_stale(entry.name):
            continue
        try:
            if entry.is_dir(follow_symlinks=False):
                shutil.rmtree(entry.path)
            else:
                os.remove(entry.path)
        except OSError:
            continue
        removed.append(entry.path)
    return removed


def os_error_code(exc: OSError) -> int | None:
    """The errno of ``exc`` (pyarrow's I/O errors carry it only in their text)."""
    if exc.errno is not None:
        return exc.errno
    m = _ERRNO_IN_TEXT.search(str(exc))
    return int(m.group(1)) if m else None


def describe_os_error(exc: OSError) -> str:
    """What went wrong in words, with the errno's name, and what to do."""
    code = os_error_code(exc)
    reason = _REASONS.get(code) or clip(exc.strerror or str(exc), 300)
    name = f" ({errno.errorcode[code]})" if code in errno.errorcode else ""
    return f"{reason}{name}; {_ADVICE.get(code, 'check the path')}"


def output_error(exc: OSError, path: str | os.PathLike) -> OutputError:
    """``exc`` (raised while writing ``path``) as an :class:`OutputError` naming the path,
    the reason and what to do."""
    path = os.fspath(path)
    err = OutputError(f"cannot write {path!r}: {describe_os_error(exc)}. Nothing was left "
                      "half-written.")
    err.errno, err.filename = os_error_code(exc), path
    return err


def check_folder(folder: str | os.PathLike) -> str:
    """The absolute path of ``folder`` if it is an existing folder this process may write
    in, else :class:`OutputError` saying which part of the path is wrong."""
    folder = os.path.abspath(os.fspath(folder))
    if os.path.isdir(folder):
        if not os.access(folder, os.W_OK | os.X_OK):
            read_only = os.statvfs(folder).f_flag & os.ST_RDONLY
            reason = "is on a read-only file system" if read_only else \
                "is not writable by this user"
            raise OutputError(f"the folder {folder!r} {reason}; choose a folder you may "
                              "write to")
        return folder
    probe = folder
    while not os.path.lexists(probe) and os.path.dirname(probe) != probe:
        probe = os.path.dirname(probe)
    if os.path.lexists(probe) and not os.path.isdir(probe):
        raise OutputError(f"{probe!r} is a file, not a folder, so {folder!r} cannot be written "
                          "in; give another path")
    raise OutputError(f"the folder {folder!r} does not exist; create it first or give "
                      "another path")


def check_target(path: str | os.PathLike) -> str:
    """The absolute path of an output file to (re)write, checked before any work: not a
    folder, in an existing folder this process may write in; else :class:`OutputError`."""
    out = os.path.abspath(os.fspath(path))
    if os.path.isdir(out):
        raise OutputError(f"{out!r} is a folder; give the name of a file to write")
    check_folder(os.path.dirname(out))
    return out


def make_folder(folder: str | os.PathLike) -> str:
    """Create the output folder ``folder`` (and its parents) unless it exists; returns its
    absolute path, or raises :class:`OutputError` when it cannot be made or written in."""
    folder = os.path.abspath(os.fspath(folder))
    if not os.path.isdir(folder):
        if os.path.lexists(folder):
            raise OutputError(f"{folder!r} is a file; give the name of a folder")
        try:
            os.makedirs(folder, exist_ok=True)
        except OSError as exc:
            if exc.errno in (errno.ENOTDIR, errno.EEXIST):
                check_folder(folder)  # names the part of the path that is a file
            raise output_error(exc, folder) from None
    return check_folder(folder)


def _fsync(path: str, directory: bool = False) -> None:
    fd = os.open(path, os.O_RDONLY | (getattr(os, "O_DIRECTORY", 0) if directory else 0))
    try:
        os.fsync(fd)
    except OSError:
        if not directory:  # some file systems cannot sync a folder; a file must sync
            raise
    finally:
        os.close(fd)


def _own_fault(exc: OSError, folder: str) -> bool:
    """Whether an OSError raised while writing into ``folder`` concerns the output (the
    writer's errors carry no file name, or one in the folder) rather than an input."""
    name = exc.filename
    return name is None or os.path.abspath(os.fspath(name)).startswith(folder + os.sep)


@contextlib.contextmanager
def replacing(path: str | os.PathLike, kind: str = "out") -> Iterator[str]:
    """Write the output ``path`` atomically: yields a temporary path in the same folder
    (an empty file of mode 0666 less the umask) for the caller to write; when the block
    ends normally the file is flushed to disk and renamed to ``path``, otherwise removed.
    File-system faults of the output raise :class:`OutputError` naming ``path``."""
    out = check_target(path)
    folder = os.path.dirname(out)
    remove_stale(folder)
    tmp = os.path.join(folder, owned_name(kind, f"-{os.path.basename(out)[:60]}.tmp"))
    try:
        os.close(os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666))
    except OSError as exc:
        raise output_error(exc, out) from None
    try:
        yield tmp
        _fsync(tmp)
        os.replace(tmp, out)
        _fsync(folder, directory=True)
    except OSError as exc:
        if not _own_fault(exc, folder):
            raise
        raise output_error(exc, out) from None
    finally:
        with contextlib.suppress(FileNotFoundError):
            os.remove(tmp)


def write_text(path: str | os.PathLike, text: str) -> None:
    """Write ``text`` (UTF-8) to ``path`` atomically (see :func:`replacing`)."""
    with replacing(path) as tmp, open(tmp, "w", encoding="utf-8") as fh:
        fh.write(text)


def new_folder(parent: str | os.PathLike, kind: str, *, private: bool = False,
               hidden: bool = True) -> str:
    """Create a temporary folder of this process in ``parent`` (after removing stale ones
    there): mode 0700 when ``private`` (scratch copies of data), else 0777 less the umask."""
    parent = check_folder(parent)
    remove_stale(parent)
    path = os.path.join(parent, owned_name(kind, hidden=hidden))
    try:
        os.mkdir(path, 0o700 if private else 0o777)
    except OSError as exc:
        raise output_error(exc, path) from None
    return path


def new_scratch_file(kind: str, suffix: str = "", folder: str | os.PathLike | None = None
                     ) -> str:
    """Create an empty private (0600) scratch file of this process in ``folder`` (default:
    the system's temporary folder), after removing stale ones there; returns its path."""
    parent = check_folder(folder if folder is not None else tempfile.gettempdir())
    remove_stale(parent)
    path = os.path.join(parent, owned_name(kind, suffix, hidden=False))
    try:
        os.close(os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600))
    except OSError as exc:
        raise output_error(exc, path) from None
    return path


def install_folder(tmp: str, out: str) -> None:
    """Rename the finished folder ``tmp`` to ``out``, replacing an existing ``out`` (moved
    aside first, put back if the rename fails, removed after)."""
    try:
        if not os.path.isdir(out):
            os.rename(tmp, out)
            return
        old = os.path.join(os.path.dirname(out), owned_name("old"))
        os.rename(out, old)
        try:
            os.rename(tmp, out)
        except BaseException:
            os.rename(old, out)
            raise
        shutil.rmtree(old, ignore_errors=True)
    except OSError as exc:
        raise output_error(exc, out) from None
