"""The live page and the Hamlib amplifier protocol (feedmatch.web)."""
