"""``python -m pipeline`` runs the same app as the ``shotsmith`` console script."""

from pipeline.cli import main

if __name__ == "__main__":
    main()
