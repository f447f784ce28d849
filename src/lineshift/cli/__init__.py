"""Command line: one module per command, shared option helpers in ``common``.

The top floor: may import anything below it; nothing imports it but ``__main__``."""

from lineshift.cli.app import main

__all__ = ["main"]
