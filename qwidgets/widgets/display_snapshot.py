"""A static copy of a widget's state in its display bundle, for notebooks viewed without a kernel.

A live widget needs a running kernel: an exported notebook (HTML) or one viewed on a code-hosting
site only has the output's mime bundle. Beside the widget view, the bundle of a widget using
:class:`SnapshotDisplay` also carries ``image/png`` (its figure) and ``text/html`` (the figure
inline and its readout). Front ends with the widget manager show the live widget; others fall
back to the copy of the state the widget had when it was displayed.
"""

from __future__ import annotations

import base64
import html as _html

__all__ = ["SnapshotDisplay", "snapshot_mimes"]


def snapshot_mimes(png: bytes | None, fragment: str, *, title: str, widget: str) -> dict:
    """``image/png`` (base64) and ``text/html`` entries for a figure and an HTML fragment.

    >>> b = snapshot_mimes(b"\\x89PNG", "<table></table>", title="scan <1>", widget="ScanView")
    >>> sorted(b), "data:image/png;base64," in b["text/html"], "scan &lt;1&gt;" in b["text/html"]
    (['image/png', 'text/html'], True, True)
    """
    out: dict = {}
    parts = [f"<div class='qw-snapshot' data-widget='{_html.escape(widget, quote=True)}'>",
             f"<div style='font-weight:bold'>{_html.escape(title)}</div>" if title else ""]
    if png:
        out["image/png"] = base64.b64encode(bytes(png)).decode("ascii")
        parts.append(f"<img src='data:image/png;base64,{out['image/png']}' alt='{_html.escape(title, quote=True)}' "
                     "style='max-width:100%'>")
    parts.append(f"<div>{fragment}</div></div>")
    out["text/html"] = "".join(parts)
    return out


class SnapshotDisplay:
    """Mix into an ipywidgets class (before the widget base) that defines
    ``snapshot() -> (png, html)`` and ``snapshot_title``."""

    snapshot_title = ""

    def _repr_mimebundle_(self, **kwargs):
        data = super()._repr_mimebundle_(**kwargs)
        if data is None:
            return None
        png, fragment = self.snapshot()
        data.update(snapshot_mimes(png, fragment, title=self.snapshot_title, widget=type(self).__name__))
        return data
