"""The seam between the host and the firmware: the only host modules that import `fmlogic`.

The firmware's logic (firmware/fmlogic/) is the source of truth for the relay banks, the
board config and its validator, the frame format, the self-test and the controller's
states; the host reaches it here and nowhere else (an import contract in pyproject.toml,
checked by tests/test_layers.py), apart from the scorer, the virtual boards and the bench,
which run the firmware's code itself.

- bank: the element banks: network file <-> lnet.Bank, board config sections <-> Bank
  (with the learned correction), codes <-> (uH, pF), the capacitor's side names, the bit
  limit, the network ranges and the default bank; the board config's defaults, merge and
  validator.
- frames: the link's frame code (fmlogic.link), for the serial client and the hub.
- logic: the rest the host shows or checks: tune outcomes, strategy names, the self-test's
  plan and fault words, the detector calibration and meter, the coupler's tolerance.
"""
