"""Analytic mock CFD solver for a rocket-sled aft body: a separate program, not a library.

It is run as ``sortie-mock-solver INPUT OUTPUT`` (or ``python -m sortie.mock_solver``) and talks
to the orchestrator only through files and exit codes, like a real solver, so the orchestrator's
process handling, parsing and failure recovery are tested for real. It never imports ``sortie``;
it needs only numpy and the standard library.
"""
