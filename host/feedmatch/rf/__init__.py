"""Radio-frequency physics: the band plan, the L-network model, the detector chain,
antennas (closed form, Touchstone, NEC-2)."""
