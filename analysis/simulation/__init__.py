"""Stage 5, simulation: circulant-embedding draws of the model families, and the synthetic demo."""
