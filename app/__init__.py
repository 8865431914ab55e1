"""Kinemark's desktop front end (PySide6). Renders what kinemark.core returns."""
