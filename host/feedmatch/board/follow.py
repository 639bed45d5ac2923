"""The `follow` job: the box follows the radio's frequency through rigctld.

When the radio moves to another memory bin with no RF on the line, the board
is asked to preset the stored state (the relays switch cold, the safest
moment there is); the lookup and the bins are the firmware's own.  The radio's
frequency and mode are sent to the board so every record carries them.

Optionally (tune_carrier_w) the radio is keyed for a tune where nothing is
stored, and only where the KeyPolicy (board/keying.py) allows it: a declared
segment inside an amateur band, clear of its edges, a carrier mode the band
plan allows there, the box's range.  Only the holder of the KeyerLock keys.
Carrier mode and a power no higher than the box's limits, read back before
keying, keyed for at most max_key_s, unkeyed on every way out (an error, a
timeout, Ctrl-C, a lost board); its power and mode are restored.  Nothing here
prints: messages go to say(text); while it cannot follow it says so every
REMIND_S.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from typing import Any

from feedmatch.board.hub import ensure_hub
from feedmatch.board.keying import KeyerLock, KeyPolicy
from feedmatch.board.link import BoardLink
from feedmatch.board.rigctl import RigClient, RigError
from feedmatch.errors import BoardRefused, InputError, LinkError
from feedmatch.seam.bank import network_of_section, side_name, state_values

MAX_KEY_S = 5.0  # the longest a tune carrier stays keyed, whatever happens
HEARTBEAT_S = 3.0  # how often the board is asked whether it is still there
SETTLE_S = 0.3     # a frequency is offered to the board once the dial has rested this long
REMIND_S = 30.0    # while it cannot follow, it says so this often: never silent


def _mhz(f: float) -> str:
    return f"{f / 1e6:.4f} MHz"


class Follower:
    def __init__(self, board_port: str, rig: RigClient, say: Callable[[str], None], baud: int = 115200,
                 tune_carrier_w: float | None = None, carrier_mode: str = "CW", rig_full_w: float = 100.0,
                 max_key_s: float = MAX_KEY_S, poll_s: float = 0.25, policy: KeyPolicy | None = None,
                 lock: KeyerLock | None = None):
        if tune_carrier_w is not None and not 0 < tune_carrier_w <= rig_full_w:
            raise InputError(f"--tune-carrier must be above 0 and at most the radio's full power "
                             f"({rig_full_w:g} W), got {tune_carrier_w:g}")
        if not 0 < max_key_s <= MAX_KEY_S:
            raise InputError(f"the key time must be above 0 and at most {MAX_KEY_S:g} s")
        if tune_carrier_w is not None and policy is None:
            raise InputError("--tune-carrier needs the segments you may transmit in (--segments) and your "
                             "ITU Region (--region)")
        self.policy, self.lock = policy, lock
        self.no_key_bins: set[int] = set()  # bins where a keyed tune found no match: not keyed again
        self.ptt_known = True
        self.remind_s = REMIND_S
        self.key_off = ""  # set when the radio refused to key: no more keying this session
        self.port, self.baud, self.rig, self.say = board_port, baud, rig, say
        self.tune_carrier_w, self.carrier_mode, self.rig_full_w = tune_carrier_w, carrier_mode, rig_full_w
        self.max_key_s, self.poll_s = max_key_s, poll_s
        self.link: BoardLink | None = None
        self.limits: dict[str, float] = {}
        self.last_bin: int | None = None
        self.last_rig: tuple[float, str] | None = None
        self.presets = 0
        # freq_hz -> {"state": [l, c, shunt], "swr": predicted, ...} or None: a state computed
        # from the measured antenna (feedmatch.sim.curvepreset), offered where nothing is stored.
        self.curve_preset: Callable[[float], dict[str, Any] | None] | None = None
        self.keyed_tunes = 0
        self.unkey_failures = 0
        self.stop = threading.Event()
        self.hub = None
        self.bank = None  # the board's element values, for uH and pF beside the codes
        self._heard = 0.0
        self.last_f: float | None = None
        self._asked = True
        self._settled = 0.0

    def close(self) -> None:
        if self.link is not None:
            self.link.close()
            self.link = None
        if self.hub is not None:
            self.hub.close()
            self.hub = None
        self.rig.close()

    # -- connections -----------------------------------------------------------------
    def _board(self) -> BoardLink:
        if self.link is None:
            self.hub = self.hub or ensure_hub(self.port, self.baud)  # owner, or attach to the owner
            ln = BoardLink(self.port, self.baud, stop_event=self.stop).open()
            try:
                ln.request("status")
                self.limits = dict(ln.request("cfg-get", {"section": "power"})["value"])
                self.bank = ln.bank()
                if self.policy is not None:
                    self._policy_from_board(ln)
            except LinkError:
                ln.close()
                raise
            except (KeyError, TypeError, ValueError) as e:
                ln.close()
                raise LinkError(f"the board's power limits are unreadable ({e!r}); is its firmware current?") \
                    from None
            self.link = ln
        return self.link

    def _policy_from_board(self, ln: BoardLink) -> None:
        """The box's own network and retune SWR decide what it can match (not a file's)."""
        from feedmatch.rf.network import network_from_dict

        assert self.policy is not None
        m = ln.element_sections()
        if m and isinstance(m.get("network"), dict):
            sec = network_of_section(m["network"])
            try:
                self.policy.network = network_from_dict(sec, "the board's network")
                self.policy._matched.clear()
            except InputError:
                pass  # an older board: the station's network stands
        try:
            self.policy.swr_limit = float(ln.request("cfg-get", {"section": "tune"})["value"]["retune_swr"])
        except (BoardRefused, KeyError, TypeError, ValueError):
            pass

    # -- the loop ----------------------------------------------------------------------
    def _read_rig(self) -> tuple[float, str, bool]:
        f = self.rig.freq()
        mode, _pb = self.rig.mode()
        if not self.ptt_known:
            return f, mode, False
        try:
            return f, mode, self.rig.ptt()
        except RigError as e:
            if e.code not in (-11, -4) or self.tune_carrier_w is not None:
                raise
            # A radio without a PTT rigctld can read still has a frequency to follow; the
            # board's hot-switch guard refuses to move relays under power whatever we think.
            self.ptt_known = False
            self.say(f"{e}. Following the frequency without knowing PTT: the board's hot-switch guard "
                     "still keeps the relays still under power")
            return f, mode, False

    def run(self, stop: threading.Event | None = None) -> None:
        if stop is not None:
            self.stop = stop
        if self.lock is not None and self.tune_carrier_w is not None:
            held = self.lock.acquire()
            self.say(f"not the keyer: {held}; following without keying" if held else
                     "this follower is the keyer for this radio and board")
        down = ""          # why it cannot follow now ("" while it follows)
        said_at = 0.0
        while not self.stop.is_set():
            try:
                f, mode, keyed = self._read_rig()
                ln = self._board()
                self._on_radio(ln, f, mode, keyed)
                if down:
                    self.say("following again: rigctld and the board answer")
                down = ""
            except RigError as e:
                self.rig.close()
                why = f"{e}"
                if why != down or time.monotonic() - said_at >= self.remind_s:
                    self.say(f"{'still ' if why == down else ''}not following: {why}; retrying every 2 s")
                    said_at = time.monotonic()
                down = why
                self.stop.wait(2.0)
                continue
            except LinkError as e:
                if self.link is not None:
                    self.link.close()
                self.link = None
                why = f"lost the board ({e})"
                if why != down or time.monotonic() - said_at >= self.remind_s:
                    self.say(f"{'still ' if why == down else ''}not following: {why}; retrying every 2 s")
                    said_at = time.monotonic()
                down = why
                self.stop.wait(2.0)
                continue
            self.stop.wait(self.poll_s)

    def _on_radio(self, ln: BoardLink, f: float, mode: str, keyed: bool) -> None:
        now = time.monotonic()
        if now - self._heard > HEARTBEAT_S:
            ln.request("status")  # a board that went quiet is noticed (LinkError), not waited on
            self._heard = now
        if (f, mode) != self.last_rig:
            self.last_rig = (f, mode)
            try:
                ln.request("rig", {"freq_hz": f, "mode": mode})
            except BoardRefused:
                pass  # older firmware: the records go without the radio's figures
        ln.pump()
        # The bins are the firmware's: every settled frequency change is offered to
        # the board, which answers with its bin and whether anything had to move.
        if f != self.last_f:
            self.last_f, self._asked = f, False
            self._settled = now
            return
        if self._asked or now - self._settled < SETTLE_S:
            return
        self._asked = True
        if keyed:
            self.say(f"{_mhz(f)} {mode}: the radio is transmitting; the box tunes on the carrier itself")
            return
        try:
            ans = ln.request("preset", {"freq_hz": f, "mode": mode})
        except BoardRefused as e:
            if e.why == "busy":
                self._asked = False  # a tune is under way: ask again on the next poll
                return
            self.say(f"{_mhz(f)} {mode}: preset refused: {e.words}")
            return
        b = ans.get("bin")
        if b is not None and b == self.last_bin and (ans.get("already") or not ans.get("preset")):
            return  # the dial moved within the same bin: said already
        self.last_bin = b
        if ans.get("already"):
            self.say(f"{_mhz(f)} {mode}: the box is already on its stored state for this frequency")
            return
        if ans.get("preset"):
            self.presets += 1
            r = ans.get("relays") or [0, 0, 0, 0]
            v = state_values(self.bank, r[0], r[1])
            vals = f" ({v[0]:.2f} uH, {v[1]:.0f} pF)" if v else ""
            self.say(f"{_mhz(f)} {mode}: preset L{r[0]} C{r[1]} {side_name(r[2])}{vals} from memory "
                     f"(stored SWR {ans.get('stored_swr')}); the first carrier confirms it")
            return
        if self.curve_preset is not None and self._preset_from_curve(ln, f, mode):
            return
        self.say(f"{_mhz(f)} {mode}: nothing stored here; the box is left as it is")
        if self.tune_carrier_w is not None:
            why = self.may_key(f, b)
            if why:
                self.say(f"{_mhz(f)}: not keying: {why}")
                return
            rec = self.keyed_tune(ln, f)
            if rec is not None and rec.get("outcome") not in ("locked", "best") and b is not None:
                self.no_key_bins.add(int(b))

    def may_key(self, f: float, bin_no: int | None = None) -> str:
        """Why a tune carrier may not be keyed at f now ("" when it may)."""
        assert self.policy is not None
        if self.key_off:
            return self.key_off
        why = self.policy.refusal(f)
        if why:
            return why
        if bin_no is not None and int(bin_no) in self.no_key_bins:
            return "a keyed tune here found no match earlier in this session; tune it by hand"
        if self.lock is not None:
            held = self.lock.acquire()
            if held:
                return f"{held}; following without keying"
        return ""

    def _preset_from_curve(self, ln: BoardLink, f: float, mode: str) -> bool:
        """Nothing stored: the state computed from the antenna the box measured, sent in a
        preset request (the board switches it cold, the first carrier confirms it)."""
        plan = self.curve_preset(f) if self.curve_preset is not None else None
        if plan is None:
            return False
        try:
            # expect_swr: the first carrier's reading is judged against the prediction (the
            # board ends there where its reading allows it); swr alone for older firmware.
            ans = ln.request("preset", {"freq_hz": f, "mode": mode, "state": plan["state"], "swr": plan["swr"],
                                        "expect_swr": plan.get("expect_swr", plan["swr"])})
        except BoardRefused as e:
            if e.why == "busy":
                self._asked = False  # a tune is under way: ask again on the next poll
                return True
            self.say(f"{_mhz(f)} {mode}: preset from the antenna curve refused ({e.why})")
            return True
        if not ans.get("preset"):
            return False  # older firmware: it knows no computed state
        self.presets += 1
        r = ans.get("relays") or plan["state"]
        z = plan["z_ohm"]
        self.say(f"{_mhz(f)} {mode}: preset L{r[0]} C{r[1]} {side_name(r[2])} from the antenna curve "
                 f"(antenna {z[0]:.1f}{z[1]:+.1f}j +- {plan['z_err_ohm']:.1f} ohm, predicted SWR {plan['swr']:.2f}); "
                 "the first carrier confirms it")
        return True

    # -- keying the radio for a tune ---------------------------------------------------
    def keyed_tune(self, ln: BoardLink, f: float) -> dict[str, Any] | None:
        """Key a tune carrier, wait for the board's record, unkey, restore.
        Returns the record, or None when the tune did not finish in time."""
        w = float(self.tune_carrier_w or 0.0)
        hot = float(self.limits.get("hot_switch_w", 0.0))
        lo, hi = float(self.limits.get("min_tune_w", 0.0)), float(self.limits.get("max_tune_w", 0.0))
        if not (lo <= w <= hi and w <= hot):
            self.say(f"not keying: {w:g} W is outside the box's tune window {lo:g}-{hi:g} W "
                     f"(hot-switch limit {hot:g} W)")
            return None
        old_mode, old_pb = self.rig.mode()
        old_power = self.rig.power()
        frac = w / self.rig_full_w
        rec = None
        keyed = False
        try:
            self.rig.set_mode(self.carrier_mode, 0)
            self.rig.set_power(frac)
            got = self.rig.power()
            if abs(got - frac) > max(0.02, 0.05 * frac):
                self.say(f"not keying: set the power to {frac:.3f} of full but the radio reads back {got:.3f}")
                return None
            before = int(ln.request("status").get("seq", 0))
            ln.request("tune", {"freq_hz": f})
            self.say(f"keying {w:g} W {self.carrier_mode} for at most {self.max_key_s:g} s to tune {_mhz(f)}")
            keyed = True
            try:
                self.rig.set_ptt(True)
            except RigError as e:
                if e.code is None:
                    raise  # rigctld went away: the loop says so and retries
                self.key_off = f"the radio refused to key earlier ({e})"
                self.say(f"cannot key: {e}. No more keying in this session")
                return None
            rec = ln.wait_event("record", lambda o: int(o.get("seq", 0)) > before, timeout=self.max_key_s)
        finally:
            if keyed:
                self._unkey()
            try:
                self.rig.set_power(old_power)
                self.rig.set_mode(old_mode, old_pb)
            except RigError as e:
                self.say(f"could not restore the radio's power and mode ({e}); check them")
        if rec is None:
            self.say(f"no tune result within {self.max_key_s:g} s: unkeyed")
            return None
        self.keyed_tunes += 1
        self.say(f"tuned {_mhz(f)}: {rec.get('outcome')}, SWR {rec.get('swr_after')} in {rec.get('n')} readings; "
                 "unkeyed, power and mode restored")
        return rec

    def _unkey(self) -> None:
        """PTT off, through a fresh connection if the old one broke; said loudly if impossible."""
        for attempt in range(3):
            try:
                self.rig.set_ptt(False)
                return
            except RigError:
                self.rig.close()
                time.sleep(0.2 * (attempt + 1))
        self.unkey_failures += 1
        self.say("COULD NOT UNKEY THE RADIO through rigctld: unkey it by hand now")
