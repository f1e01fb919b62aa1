"""The tracking store, checked before a sweep starts and named in one line when it fails during a job.

Reads the store's location (config `tracking.uri`; default the SQLite file `<results_dir>/mlflow.db`).
`check_store` writes nothing: for SQLite it opens a write transaction and rolls it back, for a server it
opens one TCP connection. `store_errors` turns what a store (or a full disk) raises inside a job into an
InputError naming the store, so the job ends in one line and writes no run record: nothing is marked done
that is not. Why a check before the sweep: an MLflow client retries an absent server for minutes per call,
and a locked or unwritable SQLite file fails only after ingestion and splitting have run.
"""

from __future__ import annotations

import contextlib
import errno
import shutil
import socket
import sqlite3
import tempfile
from pathlib import Path
from urllib.parse import urlsplit

from pipeline.errors import InputError
from pipeline.tracking import redact, sqlite_path

PROBE_TIMEOUT_S = 5.0  # a writer holding the SQLite lock this long, or a server this slow to accept, is down
MIN_FREE_BYTES = 50 * 2**20  # an MLflow run with its artifacts takes well under this
# errno values that mean "the disk cannot take this write", whatever the file
_DISK_ERRNOS = {errno.ENOSPC, errno.EDQUOT, errno.EFBIG, errno.EROFS, errno.EACCES, errno.EPERM}


def _fail(uri: str, message: str) -> InputError:
    return InputError(message, file=f"tracking store {redact(uri)}", field="tracking.uri")


def check_store(uri: str) -> None:
    """InputError (one line, naming the store) unless the store can take a run now."""
    path = sqlite_path(uri)
    if path is not None:
        _check_sqlite(uri, path)
        return
    parts = urlsplit(uri)
    if parts.scheme in ("http", "https"):
        port = parts.port or (443 if parts.scheme == "https" else 80)
        try:
            socket.create_connection((parts.hostname, port), timeout=PROBE_TIMEOUT_S).close()
        except OSError as error:
            raise _fail(uri, f"no tracking server answers at {parts.hostname}:{port} ({error.strerror or error}); "
                             f"start it or set tracking.uri") from None
    # Other schemes (a database through SQLAlchemy): the first job reports a failure in one line.


def _check_sqlite(uri: str, path: Path) -> None:
    folder = path.parent
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as error:
        raise _fail(uri, f"cannot create the folder {folder} ({error.strerror})") from None
    free = shutil.disk_usage(folder).free
    if free < MIN_FREE_BYTES:
        raise _fail(uri, f"only {free // 2**20} MiB free in {folder}; at least {MIN_FREE_BYTES // 2**20} MiB needed")
    try:  # the folder must take new files (SQLite writes a journal beside the database)
        tempfile.TemporaryFile(dir=folder).close()
    except OSError as error:
        raise _fail(uri, f"cannot write in {folder} ({error.strerror})") from None
    if not path.exists():
        return  # setup_tracking creates it
    try:
        connection = sqlite3.connect(path, timeout=PROBE_TIMEOUT_S)
        try:
            connection.execute("BEGIN IMMEDIATE")  # the write lock: fails while another process writes
            connection.rollback()
        finally:
            connection.close()
    except sqlite3.Error as error:
        raise _fail(uri, f"{error} (another process holds the database, or it is damaged)") from None


def _is_store_failure(error: BaseException) -> bool:
    """Errors of the store or of the disk under it (never a bug in the caller's own code)."""
    if isinstance(error, OSError) and error.errno in _DISK_ERRNOS:
        return True
    kinds = [sqlite3.Error]
    for module, name in (("mlflow.exceptions", "MlflowException"), ("sqlalchemy.exc", "SQLAlchemyError"),
                         ("requests.exceptions", "RequestException")):
        with contextlib.suppress(ImportError, AttributeError):
            kinds.append(getattr(__import__(module, fromlist=[name]), name))
    return isinstance(error, tuple(kinds))


@contextlib.contextmanager
def store_errors(uri: str):
    """Inside: a failing store ends as InputError naming the store and the cause; a file the disk refuses
    (full, quota, read-only) as InputError naming that file."""
    try:
        yield
    except InputError:
        raise
    except Exception as error:
        if not _is_store_failure(error):
            raise
        if isinstance(error, OSError) and error.filename:  # a local file: name it, whichever it is
            raise InputError(f"cannot write ({error.strerror})", file=str(error.filename), field="disk") from None
        cause = str(error).strip().splitlines()[0] if str(error).strip() else type(error).__name__
        raise _fail(uri, f"unavailable or full: {cause}") from None
