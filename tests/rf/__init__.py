"""The radio-frequency models (feedmatch.rf): antennas, NEC-2, the network, rational fits."""
