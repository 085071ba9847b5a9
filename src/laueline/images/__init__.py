"""Patterns as images: reading and writing, synthetic rendering, line detection.

Pixel convention, shared with point files (see :mod:`laueline.detector`):
an image array ``img[row, col]``; pixel coordinates (x, y) are (column,
row) of the pixel centre, x to the right and y down.

Submodules: :mod:`~laueline.images.io`, :mod:`~laueline.images.render`,
:mod:`~laueline.images.detect`.
"""
