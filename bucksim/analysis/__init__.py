"""Post-processing of stored segments: exact moments, the summary and its extrema,
switching and core losses, transients, the closed-form budget and the crosscheck."""
