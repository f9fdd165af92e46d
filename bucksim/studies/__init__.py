"""Studies built on settled operating points: load levels, reverse current, the strategy
comparison and load profiles."""
