"""Mask work without I/O: edits, components, vegetation index, crop rows, colour regions,
refinement, polygons.

Arrays in, arrays out, with numpy, scipy, OpenCV (no windows), scikit-image, Shapely and
rasterio's rasterisation; nothing here opens a file, imports torch or imports textual
(``tests/test_rooms.py`` and the import contracts check it). The colour overlay every
picture uses is :mod:`labeler.masks.overlay`.
"""
