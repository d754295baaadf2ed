"""Reading and writing the plan and table files (text, atomically)."""

from __future__ import annotations

import os
import tempfile


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def read_text(path, what: str) -> str:
    try:
        with open(path, encoding="utf-8") as f:
            return f.read()
    except OSError as e:
        raise OSError(f"cannot read the {what} from {os.fspath(path)!r}: {e.strerror or e}") from e
    except UnicodeDecodeError as e:
        raise ValueError(f"{os.fspath(path)!r} is not a UTF-8 text file: {e}") from None


def write_text(path, text: str, what: str) -> None:
    if not isinstance(path, (str, os.PathLike)) or not os.fspath(path):
        raise ValueError(f"path must be a non-empty file path, got {path!r}")
    path = os.fspath(path)
    folder = os.path.dirname(os.path.abspath(path))
    if os.path.isdir(path):
        raise IsADirectoryError(f"cannot write the {what} to {path!r}: it is a folder; give a file name")
    if not os.path.isdir(folder):
        raise FileNotFoundError(f"cannot write the {what} to {path!r}: folder {folder!r} does not exist")
    try:
        fd, tmp = tempfile.mkstemp(prefix=".qwidgets-", suffix=".tmp", dir=folder)
    except OSError as e:
        raise PermissionError(f"cannot write the {what} to {path!r}: {e.strerror or e}") from e
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            f.write(text)
        os.chmod(tmp, 0o666 & ~_umask())  # a temporary file is private; the result is not
        os.replace(tmp, path)
    except OSError as e:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise OSError(f"cannot write the {what} to {path!r}: {e.strerror or e}") from e
