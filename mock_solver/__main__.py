"""Allow ``python -m sortie.mock_solver INPUT OUTPUT`` (same as ``sortie-mock-solver``)."""

from .cli import main

raise SystemExit(main())
