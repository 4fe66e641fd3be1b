"""Stage 4, spectra and likelihoods: rotary periodogram and multitaper; the expected periodogram, debiased and
standard Whittle, and the exact Gaussian likelihood."""
