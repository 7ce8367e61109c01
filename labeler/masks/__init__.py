"""Pure numpy mask work: edits, components, vegetation index, refinement, polygons.

Nothing here opens files, imports torch or imports textual.
"""
