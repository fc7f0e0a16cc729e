"""The Ventcast icon (an original mark: a breath wave running into a forecast dot)."""
