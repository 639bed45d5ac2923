"""The host's side of the board (feedmatch.board): link, hub, rig control, keying, deploy, calibrate."""
