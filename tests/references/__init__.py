"""Independent solvers and models used only by the tests (scipy solve_ivp/expm, python-control)."""
