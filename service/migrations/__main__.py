"""Write the next schema revision: ``python -m service.migrations "what changed"``."""

from __future__ import annotations

import sys

from service.migrations import autogenerate_revision


def main() -> None:
    """Write the revision named by the arguments and print its path; review it next."""
    if len(sys.argv) < 2 or not " ".join(sys.argv[1:]).strip():
        sys.exit('usage: python -m service.migrations "what changed"')
    print(autogenerate_revision(" ".join(sys.argv[1:])))


if __name__ == "__main__":
    main()
