"""Talking to a real board: the serial link client, deployment, detector calibration."""
