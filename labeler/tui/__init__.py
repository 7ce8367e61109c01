"""The Textual terminal queue (the only room that imports textual)."""
