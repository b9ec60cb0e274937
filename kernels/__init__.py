"""JIT-compiled microkernels and their registry."""
