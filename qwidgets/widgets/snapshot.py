"""Static snapshots in a widget's display bundle, so exported notebooks still show the plots.

A live widget needs a running kernel; a notebook exported to HTML, or viewed on a code-hosting
site, only has the outputs' mime bundles. Next to the widget view, a widget display also
carries ``image/png`` (the figure) and ``text/html`` (the figure inline plus the readout): a
front end with the widget manager shows the live widget, anything else falls back to the
snapshot of the state the widget had when it was displayed.

``snapshot_bundle(png, html="", *, title="", widget="") -> dict``
    The two mime entries for a PNG and an HTML fragment (``widget``: the class name, written
    as the outer ``<div>``'s ``data-widget`` attribute so a test can tell snapshots apart).
``SnapshotMixin``
    Mix into an ipywidgets class (before the widget base class) and define
    ``snapshot() -> (png_bytes, html)`` (and optionally ``snapshot_title``, a str attribute or
    property): the display bundle then carries the snapshot.
"""

from __future__ import annotations

import base64
import html as _html

__all__ = ["SNAPSHOT_CLASS", "SnapshotMixin", "snapshot_bundle"]

SNAPSHOT_CLASS = "qw-snapshot"  # the CSS class of the snapshot's outer <div> (tests look for it)


def snapshot_bundle(png: bytes | None, html: str = "", *, title: str = "", widget: str = "") -> dict:
    """Mime entries for a static snapshot: ``image/png`` (base64) and ``text/html``.

    The HTML holds the title (escaped), the PNG as an inline ``data:`` image and ``html`` (a
    trusted fragment the widget produced, such as its readout table), in a ``<div>`` of class
    ``qw-snapshot`` whose ``data-widget`` attribute is ``widget``.

    >>> b = snapshot_bundle(b"\\x89PNG fake", "<table></table>", title="weights <of> fc1",
    ...                     widget="GridExplorer")
    >>> sorted(b), b["image/png"][:8]
    (['image/png', 'text/html'], 'iVBORyBm')
    >>> "data:image/png;base64,iVBORyBm" in b["text/html"], "&lt;of&gt;" in b["text/html"]
    (True, True)
    >>> "data-widget='GridExplorer'" in b["text/html"]
    True
    >>> snapshot_bundle(None, "<b>no plot yet</b>")["text/html"].count("<img")
    0
    """
    if png is not None and not isinstance(png, (bytes, bytearray)):
        raise TypeError(f"png must be PNG bytes or None, got {type(png).__name__}")
    if not isinstance(html, str):
        raise TypeError(f"html must be a str, got {type(html).__name__}")
    parts = [f"<div class='{SNAPSHOT_CLASS}' data-widget='{_html.escape(widget, quote=True)}'>"]
    if title:
        parts.append(f"<div style='font-weight:bold'>{_html.escape(title)}</div>")
    bundle: dict = {}
    if png:
        encoded = base64.b64encode(bytes(png)).decode("ascii")
        bundle["image/png"] = encoded
        alt = _html.escape(title or "plot", quote=True)
        parts.append(f"<img src='data:image/png;base64,{encoded}' alt='{alt}' "
                     "style='max-width:100%;vertical-align:top'>")
    if html:
        parts.append(f"<div style='display:inline-block;vertical-align:top'>{html}</div>")
    parts.append("</div>")
    bundle["text/html"] = "".join(parts)
    return bundle


class SnapshotMixin:
    """Adds a static snapshot (``snapshot() -> (png, html)``) to an ipywidget's display bundle.

    >>> import ipywidgets as widgets
    >>> class Boxed(SnapshotMixin, widgets.VBox):
    ...     def snapshot(self):
    ...         return b"\\x89PNG", "<i>state</i>"
    >>> bundle = Boxed()._repr_mimebundle_()
    >>> "application/vnd.jupyter.widget-view+json" in bundle, "<i>state</i>" in bundle["text/html"]
    (True, True)
    """

    snapshot_title = ""

    def snapshot(self) -> tuple[bytes | None, str]:
        raise NotImplementedError

    def _repr_mimebundle_(self, **kwargs):
        bundle = super()._repr_mimebundle_(**kwargs) or {}
        png, html = self.snapshot()
        bundle.update(snapshot_bundle(png, html, title=self.snapshot_title,
                                      widget=type(self).__name__))
        return bundle
