"""The command line (feedmatch.cli): bad input, and whole stations end to end."""
