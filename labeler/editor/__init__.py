"""The mask editor: ``state`` (pure numpy) and ``window`` (the OpenCV shell)."""
