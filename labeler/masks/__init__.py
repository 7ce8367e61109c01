"""Pure numpy mask work: edits, components, vegetation index, colour regions, refinement,
polygons.

Nothing here opens files, imports torch or imports textual.
"""
