"""HDF5 storage of runs: atomic and streamed writing, guarded reading, block summaries."""
