"""Renamed public names: the old spelling keeps working for one release and warns once.

Every rename is listed in CHANGELOG.md. A warning names the new spelling; each (place, old
name) pair warns once per process, so a loop over a renamed keyword does not flood the output.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping

_warned: set = set()  # (where, old) pairs already warned about in this process


def warn_renamed(old: str, new: str, where: str, *, stacklevel: int = 3) -> None:
    """Warn once (``DeprecationWarning``) that ``where``'s ``old`` is now ``new``.

    >>> import warnings
    >>> with warnings.catch_warnings(record=True) as w:
    ...     warnings.simplefilter("always")
    ...     warn_renamed("old_kw", "new_kw", "doctest_example")
    ...     warn_renamed("old_kw", "new_kw", "doctest_example")
    >>> len(w), str(w[0].message)
    (1, 'doctest_example: old_kw is deprecated, use new_kw (old_kw will be removed in the next release)')
    """
    key = (where, old)
    if key in _warned:
        return
    _warned.add(key)
    warnings.warn(f"{where}: {old} is deprecated, use {new} ({old} will be removed in the next release)",
                  DeprecationWarning, stacklevel=stacklevel)


def take_renamed(given: Mapping, renames: Mapping[str, str], where: str) -> dict:
    """The new names of the renamed keywords in ``given`` (old -> value), each warned about
    once; a keyword that was never a name of ``where`` raises TypeError as Python would.

    >>> import warnings
    >>> with warnings.catch_warnings():
    ...     warnings.simplefilter("ignore")
    ...     take_renamed({"weight_kib": 2.0}, {"weight_kib": "model_kib"}, "doctest_take")
    {'model_kib': 2.0}
    """
    unknown = [k for k in given if k not in renames]
    if unknown:
        raise TypeError(f"{where}() got an unexpected keyword argument {unknown[0]!r}")
    out = {}
    for old, value in given.items():
        warn_renamed(old, renames[old], where, stacklevel=4)
        out[renames[old]] = value
    return out
