"""Simulation: the station, the virtual and emulated boards, drawn boxes, load corpora,
the scorer, box fitting, the demo."""
