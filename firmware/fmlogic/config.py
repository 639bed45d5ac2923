# Board configuration: defaults and the one validator, run by the host before
# deploy and by the board at boot.  validate() returns a list of error strings,
# each naming the field; an empty list means the config is good.

FORMAT = 1
# Elements per bank at most (lnet.Bank tabulates all 2^n codes of a bank); the host takes it from here.
MAX_BITS = 12

DEFAULTS = {
    "format": FORMAT,
    "board": "virtual",
    "board_id": "unnamed",
    "pins": {},
    "network": {
        "z0_ohm": 50.0,
        "inductors_uh": [0.1, 0.2, 0.4, 0.8, 1.6, 3.2, 6.4],
        "capacitors_pf": [10.0, 20.0, 40.0, 80.0, 160.0, 320.0, 640.0],
        "inductor_q": 150.0,
        "capacitor_q": 1000.0,
        # Elements a self-test found stuck ("L3:stuck-out", "side:stuck-ant"):
        # the search, memory and presets keep to the states the box still reaches.
        "failed": [],
    },
    "detector": {
        # (counts, watts) pairs; the shipped table is the simulator's nominal
        # detector and must be replaced by a bench calibration.
        "fwd": [[30.0, 0.05], [4000.0, 200.0]],
        "ref": [[30.0, 0.05], [4000.0, 200.0]],
        "floor_counts": 2.0,
        "burst": 16,
        # The coupler's leakage |gamma| into a matched dummy load, as
        # `feedmatch calibrate` measures it (0.056 = 25 dB directivity, a
        # typical home-built tandem coupler until calibrated; common practice).
        "leak": 0.056,
        # The forward port's leakage |d_f| from the reversed calibration pass;
        # null: taken equal to leak.
        "leak_fwd": None,
        # How far the forward/reflected gain ratio may be from 1 (dB).
        "gain_tol_db": 0.6,
        # The coupler's complex error from the multi-state calibration
        # (feedmatch calibrate --coupler): [d_r re, d_r im, d_f re, d_f im,
        # gain ratio k, error bound]; null until learned (fmlogic.coupler).
        "coupler": None,
        # The element scales (fitted over nominal, inductors then capacitors)
        # the same calibration measured with it; the firmware leaves them to
        # the host, whose refinement from logged tunes (fit-box --coupler)
        # holds them.  null until learned.
        "coupler_scales": None,
    },
    "power": {
        "min_tune_w": 2.0,
        "max_tune_w": 25.0,
        "hot_switch_w": 30.0,
        "max_w": 200.0,
    },
    "tune": {
        "strategy": "recall",
        "target_swr": 1.5,
        "retune_swr": 2.0,
        "budget": 60,
        "time_limit_ms": 4000,
        "settle_ms": 10,
        "rf_wait_ms": 10000,
        "auto": True,
    },
    "memory": {"bin_hz": 25000, "max_entries": 400},
    # Records live on flash, never in RAM (fmlogic.memory.Records): 2000 of
    # about 450 bytes take under 1 MB of the Pico's 1.4 MB file system.
    "records": {"keep": 2000},
    "link": {"baud": 115200},
    "counter": {"prescale": 64, "gate_ms": 50},
}

# (section, key): (kind, low, high); kind "n" number, "i" integer, "b" bool, "s" string
RANGES = {
    ("power", "min_tune_w"): ("n", 0.01, 1000.0),
    ("power", "max_tune_w"): ("n", 0.01, 1000.0),
    ("power", "hot_switch_w"): ("n", 0.0, 1000.0),
    ("power", "max_w"): ("n", 0.1, 5000.0),
    ("tune", "target_swr"): ("n", 1.01, 5.0),
    ("tune", "retune_swr"): ("n", 1.01, 10.0),
    ("tune", "budget"): ("i", 1, 500),
    ("tune", "time_limit_ms"): ("i", 50, 60000),
    ("tune", "settle_ms"): ("i", 0, 500),
    ("tune", "rf_wait_ms"): ("i", 0, 600000),
    ("tune", "auto"): ("b", 0, 0),
    ("tune", "strategy"): ("s", 0, 0),
    ("memory", "bin_hz"): ("n", 100.0, 10000000.0),
    ("memory", "max_entries"): ("i", 1, 4000),
    ("records", "keep"): ("i", 4, 5000),
    ("link", "baud"): ("i", 1200, 2000000),
    ("counter", "prescale"): ("i", 1, 4096),
    ("counter", "gate_ms"): ("i", 5, 1000),
    ("detector", "floor_counts"): ("n", 0.0, 100000.0),
    ("detector", "burst"): ("i", 1, 1024),
    ("detector", "leak"): ("n", 0.0, 0.5),
    ("detector", "gain_tol_db"): ("n", 0.0, 6.0),
    ("network", "z0_ohm"): ("n", 1.0, 1000.0),
    ("network", "inductor_q"): ("n", 1.0, 100000.0),
    ("network", "capacitor_q"): ("n", 1.0, 100000.0),
}
STRATEGIES = ("grid", "model", "recall")
BOARDS = ("rp2040", "esp32", "virtual")


def merged(cfg):
    """Defaults overlaid with cfg (one level of sections deep)."""
    out = {}
    for k in DEFAULTS:
        v = DEFAULTS[k]
        if isinstance(v, dict):
            d = {}
            for kk in v:
                d[kk] = v[kk]
            src = cfg.get(k) if isinstance(cfg, dict) else None
            if isinstance(src, dict):
                for kk in src:
                    d[kk] = src[kk]
            out[k] = d
        else:
            out[k] = cfg.get(k, v) if isinstance(cfg, dict) else v
    if isinstance(cfg, dict):
        for k in cfg:
            if k not in out:
                out[k] = cfg[k]
    return out


def _is_num(v):
    return (isinstance(v, int) or isinstance(v, float)) and not isinstance(v, bool) and v == v \
        and v not in (float("inf"), float("-inf"))


def _check_range(errs, where, v, kind, lo, hi):
    if kind == "b":
        if not isinstance(v, bool):
            errs.append(where + " must be true or false")
        return
    if kind == "s":
        if not isinstance(v, str):
            errs.append(where + " must be a string")
        return
    if not _is_num(v) or (kind == "i" and not isinstance(v, int)):
        errs.append(where + " must be " + ("an integer" if kind == "i" else "a number"))
        return
    if v < lo or v > hi:
        errs.append("%s must be in %s..%s, got %s" % (where, lo, hi, v))


def _check_values(errs, where, v, max_len):
    if not isinstance(v, list) or not v:
        errs.append(where + " must be a non-empty list of numbers")
        return
    if len(v) > max_len:
        errs.append("%s has %d entries, at most %d allowed" % (where, len(v), max_len))
    for i in range(len(v)):
        if not _is_num(v[i]) or v[i] <= 0:
            errs.append("%s[%d] must be a number > 0" % (where, i))


def _check_table(errs, where, v):
    if not isinstance(v, list) or len(v) < 2:
        errs.append(where + " must be a list of at least 2 [counts, watts] pairs")
        return
    pc = 0.0
    pw = 0.0
    for i in range(len(v)):
        p = v[i]
        if not isinstance(p, list) or len(p) != 2 or not _is_num(p[0]) or not _is_num(p[1]):
            errs.append("%s[%d] must be [counts, watts]" % (where, i))
            return
        if p[0] <= pc or p[1] <= pw:
            errs.append("%s[%d] must rise in counts and watts (monotonic)" % (where, i))
            return
        pc = p[0]
        pw = p[1]


def validate(cfg):
    """All errors of a board config (after merging defaults), naming each field."""
    errs = []
    if not isinstance(cfg, dict):
        return ["config must be a JSON object"]
    for k in cfg:
        if k not in DEFAULTS and k != "correction":
            errs.append("unknown field '%s'" % k)
    m = merged(cfg)
    if m["format"] != FORMAT:
        errs.append("format must be %d" % FORMAT)
    if m["board"] not in BOARDS:
        errs.append("board must be one of " + ", ".join(BOARDS))
    if not isinstance(m["board_id"], str) or not m["board_id"] or len(m["board_id"]) > 32:
        errs.append("board_id must be a string of 1..32 characters")
    if not isinstance(m["pins"], dict):
        errs.append("pins must be an object")
    else:
        for k in m["pins"]:
            v = m["pins"][k]
            if not (isinstance(v, int) and not isinstance(v, bool) and 0 <= v <= 48):
                errs.append("pins.%s must be a GPIO number 0..48" % k)
    for sec in DEFAULTS:
        if isinstance(DEFAULTS[sec], dict):
            if not isinstance(cfg.get(sec, {}), dict):
                errs.append(sec + " must be an object")
                continue
            for k in cfg.get(sec, {}):
                if k not in DEFAULTS[sec] and sec != "pins":
                    errs.append("unknown field '%s.%s'" % (sec, k))
    for key in RANGES:
        kind, lo, hi = RANGES[key]
        sec = m.get(key[0])
        if isinstance(sec, dict) and key[1] in sec:
            _check_range(errs, key[0] + "." + key[1], sec[key[1]], kind, lo, hi)
    net = m["network"]
    _check_values(errs, "network.inductors_uh", net.get("inductors_uh"), MAX_BITS)
    _check_values(errs, "network.capacitors_pf", net.get("capacitors_pf"), MAX_BITS)
    if not errs:
        from fmlogic.selftest import check_failed

        check_failed(errs, "network.failed", net.get("failed", []), len(net["inductors_uh"]),
                     len(net["capacitors_pf"]))
    det = m["detector"]
    _check_table(errs, "detector.fwd", det.get("fwd"))
    _check_table(errs, "detector.ref", det.get("ref"))
    lf = det.get("leak_fwd")
    if lf is not None and not (_is_num(lf) and 0.0 <= lf <= 0.5):
        errs.append("detector.leak_fwd must be null or a number in 0..0.5")
    cp = det.get("coupler")
    if cp is not None:
        if (not isinstance(cp, list) or len(cp) != 6 or not all(_is_num(x) for x in cp)
                or abs(complex(cp[0], cp[1])) >= 0.6 or abs(complex(cp[2], cp[3])) >= 0.6
                or not 0.5 <= cp[4] <= 2.0 or not 0.0 <= cp[5] <= 0.2):
            errs.append("detector.coupler must be null or [d_r re, d_r im, d_f re, d_f im, k, err] "
                        "with |d| < 0.6, k in 0.5..2, err in 0..0.2")
    cs = det.get("coupler_scales")
    if cs is not None:
        li, ci = net.get("inductors_uh"), net.get("capacitors_pf")
        n_el = len(li) + len(ci) if isinstance(li, list) and isinstance(ci, list) else len(cs or [])
        if (not isinstance(cs, list) or len(cs) != n_el or not all(_is_num(x) and 0.5 <= x <= 2.0 for x in cs)):
            errs.append("detector.coupler_scales must be null or one scale in 0.5..2 per element "
                        "(inductors, then capacitors)")
    p = m["power"]
    if not errs:
        if p["min_tune_w"] >= p["max_tune_w"]:
            errs.append("power.min_tune_w must be below power.max_tune_w")
        if p["max_tune_w"] > p["hot_switch_w"]:
            errs.append("power.max_tune_w must not exceed power.hot_switch_w "
                        "(the search switches relays with the tune carrier on)")
        if m["tune"]["strategy"] not in STRATEGIES:
            errs.append("tune.strategy must be one of " + ", ".join(STRATEGIES))
        if m["tune"]["retune_swr"] < m["tune"]["target_swr"]:
            errs.append("tune.retune_swr must be >= tune.target_swr")
    corr = cfg.get("correction")
    if corr is not None:
        if not isinstance(corr, dict):
            errs.append("correction must be an object")
        else:
            for k in corr:
                if k not in ("inductors_uh", "capacitors_pf", "note"):
                    errs.append("unknown field 'correction.%s'" % k)
            for k, n in (("inductors_uh", len(net.get("inductors_uh") or [])),
                         ("capacitors_pf", len(net.get("capacitors_pf") or []))):
                if k in corr:
                    _check_values(errs, "correction." + k, corr[k], MAX_BITS)
                    if isinstance(corr[k], list) and len(corr[k]) != n:
                        errs.append("correction.%s must have %d entries like network.%s" % (k, n, k))
    return errs


def bank_from(m):
    """The firmware Bank for a merged config, with any learned correction."""
    from fmlogic import lnet

    net = m["network"]
    b = lnet.Bank(net["z0_ohm"], net["inductors_uh"], net["capacitors_pf"],
                  net.get("inductor_q") or 0.0, net.get("capacitor_q") or 0.0)
    corr = m.get("correction")
    if isinstance(corr, dict):
        b.set_values(corr.get("inductors_uh", net["inductors_uh"]),
                     corr.get("capacitors_pf", net["capacitors_pf"]))
    return b


def meter_from(m):
    from fmlogic.swr import Calibration, Meter

    det = m["detector"]
    fl = det["floor_counts"]
    return Meter(Calibration(det["fwd"], fl), Calibration(det["ref"], fl), m["power"]["min_tune_w"] * 0.25)
