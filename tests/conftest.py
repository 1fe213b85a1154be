"""Shared test setup.

Matplotlib must use the non-interactive Agg backend before anything imports
it (python-control imports pyplot on import), so the backend is fixed here,
before any test module is collected.
"""

import os

os.environ.setdefault("MPLBACKEND", "Agg")
