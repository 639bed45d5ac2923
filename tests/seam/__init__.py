"""The host/firmware seam (feedmatch.seam): the one translator to and from fmlogic."""
