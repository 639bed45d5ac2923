# Faults of the relay banks and the self-test's stepping plan, shared by the
# firmware (the `selftest` request, failed elements in the config) and the host
# (the simulator's --fault, the diagnosis).
#
# An element is named as the tools print it: L0..L(n-1) (bit i of l_code),
# C0..C(n-1) (bit i of c_code) and "side" (the capacitor's side relay).
# Fault kinds:
#   stuck-out   the element never enters the circuit (relay welded across an
#               inductor, open capacitor relay or a cracked capacitor)
#   stuck-in    the element is always in circuit (relay coil open or driver dead
#               on an inductor's shorting relay, welded capacitor relay)
#   drift=P%    the element acts but its value moved by P percent (a shorted
#               turn, a capacitor losing capacitance)
#   stuck-tx / stuck-ant   the side relay stays on one side
# A spec is a comma-separated list: "L3:stuck-out,C5:stuck-in,L6:drift=-30%".
#
# The self-test steps every relay from a reference state (the box's tuned
# state), then from a second reference the host picks on the other side with
# as many relays reversed as keeps the readings informative (so a stuck-in and
# a stuck-out element read differently), and once through the bypass (the
# load's own |gamma|): 2 * (1 + nL + nC) + 2 readings for a 7 + 7 bank (32),
# within the 40 the diagnosis may use.

STUCK_OUT = "stuck-out"
STUCK_IN = "stuck-in"
DRIFT = "drift"
STUCK_TX = "stuck-tx"
STUCK_ANT = "stuck-ant"
KINDS = (STUCK_OUT, STUCK_IN, DRIFT, STUCK_TX, STUCK_ANT)
# A fault the box can run around (a relay that does not follow): failed elements
# in the config.  A drift is a value to learn (correction), not a failed element.
FAILED_KINDS = (STUCK_OUT, STUCK_IN, STUCK_TX, STUCK_ANT)
DRIFT_MIN = -95.0  # percent: at -100 % the element is gone (stuck-out)
DRIFT_MAX = 300.0
MAX_READINGS = 40


def element_index(name, nl, nc):
    """("L", i), ("C", i) or ("side", 0) for an element name; ValueError otherwise."""
    if name == "side":
        return ("side", 0)
    if len(name) >= 2 and name[0] in "LC" and name[1:].isdigit():
        i = int(name[1:])
        top = nl if name[0] == "L" else nc
        if i >= top:
            raise ValueError("element %s: the bank has %s0..%s%d" % (name, name[0], name[0], top - 1))
        return (name[0], i)
    raise ValueError("element '%s': give L0..L%d, C0..C%d or side" % (name, nl - 1, nc - 1))


def parse_fault(text, nl, nc):
    """One fault "ELEMENT:KIND" -> (element, kind, drift_percent); ValueError
    with one line naming what is wrong."""
    text = text.strip()
    if ":" not in text:
        raise ValueError("fault '%s': write ELEMENT:KIND, e.g. L3:stuck-out" % text)
    i = text.index(":")
    name = text[:i].strip()
    kind = text[i + 1:].strip()
    cls = element_index(name, nl, nc)[0]
    pct = 0.0
    if cls == "side":
        if kind not in (STUCK_TX, STUCK_ANT):
            raise ValueError("fault '%s': the side relay can be stuck-tx or stuck-ant" % text)
    elif kind.startswith(DRIFT + "="):
        v = kind[len(DRIFT) + 1:]
        if not v.endswith("%"):
            raise ValueError("fault '%s': a drift is in percent, e.g. drift=-30%%" % text)
        try:
            pct = float(v[:-1])
        except ValueError:
            raise ValueError("fault '%s': a drift is in percent, e.g. drift=-30%%" % text)
        if not DRIFT_MIN <= pct <= DRIFT_MAX or pct == 0.0:
            raise ValueError("fault '%s': drift must be %g%%..%g%% and not 0" % (text, DRIFT_MIN, DRIFT_MAX))
        kind = DRIFT
    elif kind not in (STUCK_OUT, STUCK_IN):
        raise ValueError("fault '%s': kind must be stuck-out, stuck-in or drift=P%%" % text)
    return (name, kind, pct)


def parse_faults(text, nl, nc):
    """A comma-separated fault list; one fault per element."""
    out = []
    seen = []
    for part in text.split(","):
        if not part.strip():
            raise ValueError("fault list '%s' has an empty entry" % text)
        f = parse_fault(part, nl, nc)
        if f[0] in seen:
            raise ValueError("element %s has two faults" % f[0])
        seen.append(f[0])
        out.append(f)
    return out


def fault_text(f):
    """The spec of one fault, as parse_fault reads it."""
    if f[1] == DRIFT:
        return "%s:drift=%g%%" % (f[0], f[2])
    return "%s:%s" % (f[0], f[1])


def masks(faults):
    """(l_and, l_or, c_and, c_or, side) so that a commanded state (l, c, sh)
    is in fact (l & l_and | l_or, c & c_and | c_or, sh if side < 0 else side):
    the states the damaged box reaches.  Drifts do not change the state."""
    l_and = c_and = -1
    l_or = c_or = 0
    side = -1
    for f in faults:
        name = f[0]
        kind = f[1]
        if name == "side":
            side = 0 if kind == STUCK_TX else 1
            continue
        bit = 1 << int(name[1:])
        if kind == STUCK_OUT:
            if name[0] == "L":
                l_and &= ~bit
            else:
                c_and &= ~bit
        elif kind == STUCK_IN:
            if name[0] == "L":
                l_or |= bit
            else:
                c_or |= bit
    return (l_and, l_or, c_and, c_or, side)


def reach(m, state):
    """The state a box with masks m reaches when state is commanded."""
    sh = state[2] if m[4] < 0 else m[4]
    return ((state[0] & m[0]) | m[1], (state[1] & m[2]) | m[3], sh)


def plan(ref, nl, nc, side=True):
    """The commanded states of one self-test step, in order: ref, ref with each
    inductor relay toggled (L0..), each capacitor relay toggled (C0..) and, with
    side, the side relay toggled: 1 + nL + nC (+ 1) readings."""
    l0 = ref[0]
    c0 = ref[1]
    sh = ref[2]
    out = [(l0, c0, sh)]
    for i in range(nl):
        out.append((l0 ^ (1 << i), c0, sh))
    for i in range(nc):
        out.append((l0, c0 ^ (1 << i), sh))
    if side:
        out.append((l0, c0, 1 - sh))
    return out


def readings_needed(nl, nc):
    """Two steps (the second without its side toggle) and the bypass reading:
    2 * (1 + nL + nC) + 2."""
    return 2 * (1 + nl + nc) + 2


def check_failed(errs, where, v, nl, nc):
    """Validate a config's failed-element list (network.failed) into errs."""
    if not isinstance(v, list):
        errs.append(where + " must be a list of faults like \"L3:stuck-out\"")
        return
    seen = []
    for i in range(len(v)):
        if not isinstance(v[i], str):
            errs.append("%s[%d] must be a string like \"L3:stuck-out\"" % (where, i))
            continue
        try:
            f = parse_fault(v[i], nl, nc)
        except ValueError as e:
            errs.append("%s[%d]: %s" % (where, i, e))
            continue
        if f[1] not in FAILED_KINDS:
            errs.append("%s[%d]: only a stuck element is failed (a drift is a correction value)"
                        % (where, i))
        elif f[0] in seen:
            errs.append("%s[%d]: element %s is listed twice" % (where, i, f[0]))
        seen.append(f[0])


class Damage:
    """A box with failed elements (the config's network.failed), as the search
    sees it: a bank of the elements still switching, with the stuck-in ones as a
    fixed inductance or capacitance, and the maps between its codes (reduced)
    and the relay codes (full).  A stuck side relay is not in the bank: full()
    commands the side it is stuck on (the bench found the search does better
    reading there than being told "no match" for the other side)."""

    def __init__(self, failed, bank):
        self.side = -1
        out_l = 0
        in_l = 0
        out_c = 0
        in_c = 0
        for f in failed:
            name = f[0]
            if name == "side":
                self.side = 0 if f[1] == STUCK_TX else 1
                continue
            bit = 1 << int(name[1:])
            if name[0] == "L":
                if f[1] == STUCK_IN:
                    in_l |= bit
                else:
                    out_l |= bit
            elif f[1] == STUCK_IN:
                in_c |= bit
            else:
                out_c |= bit
        self.l_keep = [i for i in range(bank.nl) if not (out_l | in_l) >> i & 1] or list(range(bank.nl))
        self.c_keep = [i for i in range(bank.nc) if not (out_c | in_c) >> i & 1] or list(range(bank.nc))
        self.l_or = in_l
        self.c_or = in_c
        l_fixed = 0.0
        c_fixed = 0.0
        for i in range(bank.nl):
            if in_l >> i & 1:
                l_fixed += bank.ind[i]
        for i in range(bank.nc):
            if in_c >> i & 1:
                c_fixed += bank.cap[i]
        from fmlogic import lnet

        ind = [bank.ind[i] for i in self.l_keep]
        cap = [bank.cap[i] for i in self.c_keep]
        self.bank = lnet.Bank(bank.z0, ind, cap, bank.ql, bank.qc)
        self.bank.set_values(ind, cap, l_fixed, c_fixed)

    def full(self, st):
        """Relay codes for a search state (stuck relays commanded as they are)."""
        return (_spread(st[0], self.l_keep) | self.l_or, _spread(st[1], self.c_keep) | self.c_or,
                st[2] if self.side < 0 else self.side)

    def reduced(self, st):
        """The search's codes for relay codes (a memory entry)."""
        return (_pack(st[0], self.l_keep), _pack(st[1], self.c_keep), st[2])



def _spread(code, keep):
    out = 0
    for j in range(len(keep)):
        if code >> j & 1:
            out |= 1 << keep[j]
    return out


def _pack(code, keep):
    out = 0
    for j in range(len(keep)):
        if code >> keep[j] & 1:
            out |= 1 << j
    return out


def damage_from(cfg, bank):
    """The Damage of a merged config's network.failed, or None for a whole box."""
    failed = cfg["network"].get("failed") or []
    if not failed:
        return None
    return Damage([parse_fault(t, bank.nl, bank.nc) for t in failed], bank)


def run(ctl, ref, side, bypass=False):
    """Step the relays through plan(ref) on the controller ctl with the carrier
    on, every change through its hot-switch gate (ctl._switch), then put the
    relays back as they were.  Returns (|gamma| x 1000 per state read, why the
    steps stopped early or "", |gamma| x 1000 through the bypass or -1).  With
    bypass the antenna is read once through the bypass relay after the steps:
    the load's own |gamma|, which ties every hypothesis of the host's diagnosis
    to one load.  A reading outside the tune window stops the test: the
    carrier went away or rose, and nothing more is switched."""
    from array import array

    from fmlogic.swr import reading_gamma

    bank = ctl.bank
    states = plan(ref, bank.nl, bank.nc, side)
    out = array("h", bytes(2 * len(states)))  # preallocated: nothing grows while relays move
    n = 0
    why = ""
    before = ctl.relays
    byp = ctl.bypass
    lo = ctl.power["min_tune_w"]
    hi = ctl.power["max_tune_w"]
    settle = ctl.tuning["settle_ms"]
    for st in states:
        if not ctl._switch(st, False):
            why = "power above hot-switch limit"
            break
        ctl.board.sleep_ms(settle)
        fwd, rev = ctl._read()
        ctl.board.wdt_feed()
        if fwd < lo:
            why = "carrier lost"
            break
        if fwd > hi:
            why = "power rose above tune window"
            break
        g = reading_gamma(fwd, rev)
        out[n] = int(g * 1000.0 + 0.5) if g >= 0.0 else -1
        n += 1
    gb = -1
    if bypass and not why:
        if not ctl._switch(states[0], True):
            why = "power above hot-switch limit"
        else:
            ctl.board.sleep_ms(settle)
            fwd, rev = ctl._read()
            ctl.board.wdt_feed()
            if lo <= fwd <= hi:
                g = reading_gamma(fwd, rev)
                gb = int(g * 1000.0 + 0.5) if g >= 0.0 else -1
            else:
                why = "carrier lost" if fwd < lo else "power rose above tune window"
    # Back where the box was (the gate still applies: above the limit it holds).
    if not ctl._switch(before, byp) and not why:
        why = "relays held after the test (power above hot-switch limit)"
    return [out[i] for i in range(n)], why, gb
