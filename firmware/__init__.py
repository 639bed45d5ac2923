"""The board tree, shipped as data of the host package (feedmatch.firmware); never deployed."""
