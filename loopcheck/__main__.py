"""``python -m loopcheck`` runs the command-line interface."""

from loopcheck.cli.main import app

if __name__ == "__main__":  # pragma: no cover - exercised through subprocess tests
    app(prog_name="loopcheck")
