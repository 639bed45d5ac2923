"""The simulation and the scorer (feedmatch.sim): design, faults, drawn boxes, the emulated chip."""
