"""The firmware's logic (fmlogic) and board drivers, under CPython, the unix ports and the chip."""
