"""Data files the package ships: the demo classifier's weights (``qwidgets.demo``)."""
