"""Benchmarks: speed, accuracy, heap and the emulated chip (`make bench`)."""
