"""The ``shunt`` command installed with the package: the same program as the
Rust binary, run in-process."""

import sys

from . import _native


def main() -> None:
    """Runs ``shunt`` on ``sys.argv`` and exits with its exit code."""
    sys.exit(_native.main(["shunt", *sys.argv[1:]]))


if __name__ == "__main__":
    main()
