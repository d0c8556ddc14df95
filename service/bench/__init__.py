"""The project's benchmarks (`twistrate bench NAME`); imported by nothing else."""
