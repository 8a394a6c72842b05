"""Allow ``python -m covextract``."""

from covextract.cli.app import main

if __name__ == "__main__":
    main()
