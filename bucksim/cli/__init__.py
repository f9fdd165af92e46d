"""The ``bucksim`` command: one module per verb; :func:`bucksim.cli.main.main` dispatches."""
