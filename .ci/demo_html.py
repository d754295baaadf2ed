# nbconvert configuration for `HEADLESS=1 make demo` (.ci/demo) and tests/test_notebook.py.
# A page exported from an executed notebook has no kernel (and, offline, no widget scripts), so
# a live widget view would stay empty there: prefer each widget's static snapshot (its display
# bundle's text/html and image/png) to the widget view.
c = get_config()  # noqa: F821 (provided by traitlets when it loads this file)
c.NbConvertBase.display_data_priority = [
    "text/html",
    "text/markdown",
    "image/svg+xml",
    "text/latex",
    "image/png",
    "image/jpeg",
    "application/vnd.jupyter.widget-view+json",
    "application/javascript",
    "text/plain",
]
