"""eaves: measure a CPU host's ceilings and place layer timings under them."""

__version__ = "0.1.0"
