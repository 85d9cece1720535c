"""`python -m runner` is the same as the `weir` command."""

from runner.cli import main

if __name__ == "__main__":  # pragma: no cover - exercised through subprocess tests
    main()
