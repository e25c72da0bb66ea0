"""``python -m kidneycohort``: the command line (:func:`kidneycohort.cli.main`)."""

from __future__ import annotations

from kidneycohort.cli import main

__all__ = ["main"]

if __name__ == "__main__":
    main()
