"""Periodic steady state by shooting-Newton on the exact period map, open and closed loop."""
