"""Per-step numerics: the compiled kernels and their numpy twins, the Bayesian decoder, spike binning, the reference filter."""
