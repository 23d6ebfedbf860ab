"""Matplotlib figures; each function takes ``ax=None`` and returns the figure."""
