"""``python -m harmonize``: the harmonize command."""

from harmonize.cli.app import main

if __name__ == "__main__":
    main()
