"""Command line (placeholder until the foundation lands)."""

__all__ = ["main"]


def main(argv=None) -> int:
    return 0
