"""Labels drawn as literal text: a layer named ``w$^$`` must not be read as math.

matplotlib reads text between two dollar signs as math (and fails on what it cannot parse).
Text objects made here take ``parse_math=False``; tick labels, made by matplotlib from strings,
get their dollar signs escaped instead.
"""

from __future__ import annotations

__all__ = ["literal"]


def literal(text) -> str:
    """``text`` with every dollar sign escaped, so matplotlib draws it as written.

    >>> literal("conv_$a$"), literal("fc1")
    ('conv_\\\\$a\\\\$', 'fc1')
    """
    return str(text).replace("$", r"\$")
