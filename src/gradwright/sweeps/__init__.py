"""SSA to sweeps: activity analysis, the reverse sweep and its optimisations."""
