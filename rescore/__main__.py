"""``python -m rescore`` runs the command line."""

from rescore.cli import main

if __name__ == "__main__":
    main()
