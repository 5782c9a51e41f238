"""Generated planning scenarios (LP models of our own invention) for tests, demos and benchmarks."""
