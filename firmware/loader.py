# Deployed as the board's main.py: runs the firmware version named in
# fm/current.  A deploy stages a whole new version in fm/<version>/ and only
# then rewrites fm/current by one rename, so the board never runs half of a
# new version; the previous version stays on the board until the next deploy.
import sys


def _current():
    for name in ("fm/current", "fm/current.bak"):
        try:
            with open(name) as f:
                v = f.read().strip()
            if v:
                return v
        except OSError:
            pass
    return None


_v = _current()
if _v is None:
    print("feedmatch: no firmware version installed (fm/current missing)")
else:
    sys.path.insert(0, "fm/" + _v)
    import fm_main  # noqa: F401  (starts the controller)
