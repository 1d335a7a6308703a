"""Signal processing with no model: LPC, cepstra, excitation, synthesis, G.711, the telephone channel, and the compiled kernels under them."""
