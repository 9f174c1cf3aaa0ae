"""rigside's benchmarks: scripts that print figures (never timed tests); `python -m benchmarks` runs them all."""
