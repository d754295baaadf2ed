"""Reading and writing the plan and table files (text, atomically).

The text goes to a new temporary file beside the target, which then replaces the target in one
rename, so a reader never sees half a file and a failed write leaves an older file as it was.
The temporary file is created with mode 0o666 and the kernel applies the process umask, as for
``open(path, "w")``: the process-wide umask is never changed (that would not be thread-safe).
Errors keep their class (``FileNotFoundError``, ``PermissionError``, ...) and errno, with a message
naming what was being read or written.
"""

from __future__ import annotations

import os
import secrets

_TRIES = 16  # attempts at a fresh temporary name (a clash needs 48 random bits to repeat)


def _error(e: OSError, message: str) -> OSError:
    # OSError(errno, text) builds the matching subclass (ENOENT -> FileNotFoundError, ...)
    return OSError(e.errno, message) if e.errno is not None else OSError(message)


def read_text(path, what: str) -> str:
    """Return the UTF-8 text of ``path``; errors keep their class and name the ``what``."""
    try:
        with open(path, encoding="utf-8") as f:
            return f.read()
    except OSError as e:
        raise _error(e, f"cannot read the {what} from {os.fspath(path)!r}: {e.strerror or e}") from e
    except UnicodeDecodeError as e:
        raise ValueError(f"{os.fspath(path)!r} is not a UTF-8 text file: {e}") from None


def _create_temporary(folder: str, base: str) -> tuple[int, str]:
    for _ in range(_TRIES):
        tmp = os.path.join(folder, f".{base}.{secrets.token_hex(6)}.tmp")
        try:
            return os.open(tmp, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o666), tmp
        except FileExistsError:
            continue
    raise FileExistsError(f"no free temporary file name in {folder!r} after {_TRIES} tries")


def write_text(path, text: str, what: str) -> None:
    """Write ``text`` to ``path`` atomically (a temporary file renamed over the target)."""
    if not isinstance(path, (str, os.PathLike)):
        raise TypeError(f"path must be a file path (str or os.PathLike), got {type(path).__name__}")
    path = os.fspath(path)
    if not isinstance(path, str) or not path:
        raise ValueError(f"path must be a non-empty file path, got {path!r}")
    folder = os.path.dirname(os.path.abspath(path))
    if os.path.isdir(path):
        raise IsADirectoryError(f"cannot write the {what} to {path!r}: it is a folder; give a file name")
    if not os.path.isdir(folder):
        raise FileNotFoundError(f"cannot write the {what} to {path!r}: folder {folder!r} does not exist")
    try:
        fd, tmp = _create_temporary(folder, os.path.basename(path))
    except OSError as e:
        raise _error(e, f"cannot write the {what} to {path!r}: {e.strerror or e}") from e
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            f.write(text)
        os.replace(tmp, path)
    except OSError as e:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise _error(e, f"cannot write the {what} to {path!r}: {e.strerror or e}") from e
