# Damaged files on the emulated Pico (or any port): each directory named in
# damage.json holds a lived board with one file damaged; the real start
# (fmlogic.boot.start) runs on each, then a `status` request over the link.
# Output lines (parsed by bench/life.py):
#   CASE <dir> <Controller|SafeMode> <state> <file or -> <seq> <ms to the answer> <fed 0|1> <through 0|1> <warnings>
#   DONE <cases>
import json
import time

from fmlogic import boot, link


class B:
    def __init__(self):
        self.inbox = []
        self.out = bytearray()
        self.relays = None
        self.t = 0
        self.feeds = 0

    def read_detectors(self):
        return (0.0, 0.0)

    def set_relays(self, l, c, sh, byp):
        self.relays = (l, c, sh, 1 if byp else 0)

    def count_freq(self):
        return 0.0

    def tune_button(self):
        return False

    def led(self, on):
        pass

    def wdt_feed(self):
        self.feeds += 1

    def ticks_ms(self):
        return self.t

    def ticks_diff(self, a, b):
        return a - b

    def sleep_ms(self, ms):
        self.t += ms

    def link_read(self):
        return self.inbox.pop(0) if self.inbox else None

    def link_write(self, d):
        self.out.extend(d)


def case(d):
    b = B()
    t0 = time.ticks_ms()
    x = boot.start(d, lambda cfg: b, run=False)
    b.inbox.append(link.encode("Q", 5, "status", {}))
    x.step()
    x.step()
    ms = time.ticks_diff(time.ticks_ms(), t0)
    st = None
    for line in bytes(b.out).split(b"\n"):
        f = link.decode(line + b"\n") if line else (None, "")
        if f[0] == "A" and f[1] == 5:
            st = f[3]
    if st is None:
        print("CASE %s %s none - -1 %d %d 0 0" % (d, type(x).__name__, ms, 1 if b.feeds >= 2 else 0))
        return
    print("CASE %s %s %s %s %d %d %d %d %d" % (
        d, type(x).__name__, st["state"], st.get("file") or "-", st["seq"], ms, 1 if b.feeds >= 2 else 0,
        1 if b.relays and b.relays[3] else 0, len(st.get("warnings") or [])))


with open("damage.json") as f_:
    dirs = json.loads(f_.read())["dirs"]
for d_ in dirs:
    try:
        case(d_)
    except Exception as e:  # a start that escaped boot.start: what the bench must never see
        print("CASE %s escaped %s - -1 0 0 0 0" % (d_, type(e).__name__))
print("DONE %d" % len(dirs))
