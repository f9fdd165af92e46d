"""The model: parts, units, scenario files and their line map, the compensator, and the
power stage as conduction states -> linear systems (``stage``)."""
