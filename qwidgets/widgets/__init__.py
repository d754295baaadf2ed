"""Notebook widgets. They draw state computed by the core modules; they never quantize themselves."""
