"""Command line: ``python -m flowpost demo [plot.png]`` runs the embedded demo."""

from __future__ import annotations

import sys


def _usage() -> int:
    print(
        "usage: python -m flowpost demo [PLOT.png]\n\n"
        "  demo   fit the kiln-cooling example and print the summary and monitor trace"
    )
    return 2


def main(argv: list[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    if not argv or argv[0] in ("-h", "--help"):
        return _usage() if not argv else (_usage() and 0)
    if argv[0] == "demo":
        from .demo import main as demo_main

        return demo_main(argv[1:])
    print(f"unknown command {argv[0]!r}")
    return _usage()


if __name__ == "__main__":
    sys.exit(main())
