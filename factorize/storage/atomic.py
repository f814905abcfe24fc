"""Atomic, exclusive outputs: temporary names beside the output, renamed into place when complete.

Every file is written to ``.<final name>.<pid>-<random>.factorize-tmp`` in the output's directory (so the final
rename is atomic on POSIX file systems), fsynced, then claimed: without ``force`` exclusively (of two writers
racing for one path, exactly one succeeds), with ``force`` by replacing. Directories are built the same way under
``.<final name>.<pid>-<random>.factorize-tmpdir``. The process id in a temporary name lets a later run remove the
leftovers of a killed writer while keeping those of a live one.
"""

from __future__ import annotations

import contextlib
import os
import secrets
import shutil
from collections.abc import Callable
from pathlib import Path

from factorize.errors import FactorizeError
from factorize.storage.proc import proc_field

TEMP_SUFFIX = ".factorize-tmp"  # temporary files are named .<final name>.<pid>-<random>.factorize-tmp
TEMP_DIR_SUFFIX = ".factorize-tmpdir"  # temp directories: .<final name>.<pid>-<random>.factorize-tmpdir


def check_output_path(path: str | os.PathLike, *, force: bool, directory: bool = False) -> Path:
    """Refuse an existing output unless ``force``; check that its parent directory exists and is writable.
    ``directory=True``: the output is a directory of shards (an existing one must be a directory)."""
    p = Path(path)
    if p.exists() and not force:
        raise FactorizeError(f"{p}: the output already exists", fix="choose another path, or pass force=True (--force)")
    if p.exists() and p.is_dir() != directory:
        raise FactorizeError(f"{p}: exists and is {'not ' if directory else ''}a directory",
                             fix="choose another output path")
    d = p.parent if str(p.parent) else Path(".")
    if not d.is_dir():
        raise FactorizeError(f"{p}: the directory {d} does not exist", fix=f"create it first (mkdir -p {d})")
    if not os.access(d, os.W_OK | os.X_OK):
        raise FactorizeError(f"{p}: cannot write in {d} (permission denied)", fix="choose a writable directory")
    return p


def create_temp_dir(final: Path, suffix: str) -> Path:
    """A new empty directory beside ``final``, named ``.<final name>.<pid>-<random><suffix>`` (hidden, unique, so
    concurrent runs never share one); a FactorizeError naming the folder when it cannot be created."""
    parent = final.parent if str(final.parent) else Path(".")
    for _ in range(100):
        tmp = parent / f".{final.name}.{os.getpid()}-{secrets.token_hex(6)}{suffix}"
        try:
            tmp.mkdir()
        except FileExistsError:
            continue
        except OSError as e:
            raise FactorizeError(f"{final}: cannot create a directory in {parent} ({e.strerror or e})",
                                 fix="choose a writable directory") from None
        return tmp
    raise FactorizeError(f"{final}: could not create a temporary directory in {parent}")


def create_temp(final: Path) -> tuple[Path, int]:
    """A new temporary file beside ``final`` (same directory, so the final rename is atomic): (path, fd).

    The name carries this process's id, so a later run can tell a leftover of a killed writer (whose process is
    gone) from a live one, and removes such leftovers first (:func:`remove_stale_temps`). Created with mode
    0o666 so the umask applies as for any new file."""
    remove_stale_temps(final.parent if str(final.parent) else Path("."), final.name)
    for _ in range(100):
        tmp = final.with_name(f".{final.name}.{os.getpid()}-{secrets.token_hex(6)}{TEMP_SUFFIX}")
        try:
            fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
        except FileExistsError:
            continue
        except OSError as e:
            raise FactorizeError(f"{final}: cannot create files in {final.parent} ({e.strerror or e})",
                                 fix="choose a writable directory") from None
        return tmp, fd
    raise FactorizeError(f"{final}: could not create a temporary file in {final.parent}")


def remove_stale_temps(directory: str | os.PathLike, name: str | None = None) -> list[Path]:
    """Remove temporary files that a killed factorize writer left in ``directory`` (for outputs called ``name``,
    or all); files of writers still running are kept. Returns the files removed."""
    removed = []
    pattern = f".{name}.*{TEMP_SUFFIX}" if name else f".*{TEMP_SUFFIX}"
    for p in Path(directory).glob(pattern):
        pid = p.name[: -len(TEMP_SUFFIX)].rpartition(".")[2].partition("-")[0]
        if pid.isdigit() and p.is_file() and not process_alive(int(pid)):
            remove_quietly(p)
            removed.append(p)
    return removed


def process_alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OverflowError, OSError):
        return True  # exists but not ours, or cannot tell: keep its files
    return True


def publish(tmp: Path, final: Path, *, force: bool) -> None:
    """Move a finished temporary file to ``final``. Without ``force`` the name is claimed exclusively (a hard
    link fails if ``final`` exists), so of two writers racing for one path exactly one succeeds."""
    if force:
        os.replace(tmp, final)
        return
    try:
        os.link(tmp, final)
    except FileExistsError:
        raise FactorizeError(f"{final}: the output appeared while writing (another writer got there first)",
                             fix="choose another path, or pass force=True (--force) to replace it") from None
    except OSError:  # a filesystem without hard links: claim the name with an exclusive create, then replace it
        try:
            os.close(os.open(final, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666))
        except FileExistsError:
            raise FactorizeError(f"{final}: the output appeared while writing (another writer got there first)",
                                 fix="choose another path, or pass force=True (--force) to replace it") from None
        os.replace(tmp, final)
        return
    remove_quietly(tmp)


def remove_quietly(p: Path) -> None:
    with contextlib.suppress(FileNotFoundError):
        p.unlink()


def write_atomic(final: Path, write: Callable[[Path], None], *, force: bool) -> None:
    """Run ``write(tmp)`` on a temporary file beside ``final``, fsync it, then move it into place
    (:func:`publish`). On any failure the temporary file is removed and ``final`` is untouched."""
    tmp, fd = create_temp(final)
    os.close(fd)
    try:
        write(tmp)
        os.chmod(tmp, 0o666 & ~_umask())  # a writer may create its file private (0600); use the usual mode
        _fsync(tmp)
        publish(tmp, final, force=force)
    except OSError as e:
        remove_quietly(tmp)
        raise FactorizeError(f"{final}: writing failed ({e.strerror or e}); nothing was written",
                             fix="check free space and permissions, then retry") from e
    except BaseException:
        remove_quietly(tmp)
        raise


def _umask() -> int:
    """The process umask, read without changing it where /proc allows (os.umask can only set it)."""
    value = proc_field("/proc/self/status", "Umask")
    if value is not None:
        return int(value, 8)
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _fsync(p: Path) -> None:
    fd = os.open(p, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def new_temp_dir(final: Path) -> Path:
    """A fresh hidden directory beside ``final`` to build it in (:func:`publish_dir` moves it into place); the
    leftovers of killed writers of the same output are removed first."""
    remove_stale_dirs(final.parent if str(final.parent) else Path("."), final.name)
    return create_temp_dir(final, TEMP_DIR_SUFFIX)


def remove_stale_dirs(parent: Path, name: str) -> None:
    """Remove temp directories that a killed writer of the same output left behind (its process is gone)."""
    for p in parent.glob(f".{name}.*{TEMP_DIR_SUFFIX}"):
        pid = p.name[: -len(TEMP_DIR_SUFFIX)].rpartition(".")[2].partition("-")[0]
        if pid.isdigit() and not process_alive(int(pid)) and p.is_dir():
            shutil.rmtree(p, ignore_errors=True)


def publish_dir(tmp: Path, final: Path, *, force: bool) -> None:
    """Move the finished temp directory to ``final``. Without ``force`` the name is claimed with an exclusive
    mkdir (of two writers racing, one wins), then the empty claim is replaced by rename (POSIX rename(2) replaces
    an empty directory). With ``force`` an existing directory is moved aside first and removed afterwards."""
    if final.exists():
        if not force:
            raise FactorizeError(f"{final}: the output appeared while writing (another writer got there first)",
                                 fix="choose another path, or pass force=True (--force) to replace it")
        aside = final.with_name(f".{final.name}.{os.getpid()}-{secrets.token_hex(6)}.old{TEMP_DIR_SUFFIX}")
        os.rename(final, aside)
        try:
            os.rename(tmp, final)
        except BaseException:
            os.rename(aside, final)
            raise
        shutil.rmtree(aside, ignore_errors=True)
        return
    try:
        final.mkdir()
    except FileExistsError:
        raise FactorizeError(f"{final}: the output appeared while writing (another writer got there first)",
                             fix="choose another path, or pass force=True (--force) to replace it") from None
    try:
        os.rename(tmp, final)
    except BaseException:
        final.rmdir()
        raise
