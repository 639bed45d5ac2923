// The emulated Raspberry Pi Pico for feedmatch: a MicroPython rp2 image plus a
// littlefs image in rp2040js, its peripherals wired to the host over one TCP
// line protocol (the host's simulated station answers the pins).
//
//   node pico.mjs UF2 FS_IMAGE CTL_PORT [PINS_JSON]
//
// host -> emulator, one command per line:
//   repl TEXT            type TEXT and Enter at the REPL (USB CDC)
//   cdc HEX              bytes into the USB CDC serial port
//   uart HEX             bytes into UART0 RX
//   adc CH VALUE         an ADC channel's 12-bit reading
//   freq HZ              square wave on the counter pin (0: none)
//   pin GPIO 0|1         drive an input pin (the tune button)
//   resume               continue after a relay latch
//   dump                 send the flash file system back
//   quit
// emulator -> host:
//   booted NANOS         the chip (re)started
//   cdc HEX / uart HEX   bytes the firmware sent (USB CDC / UART0 TX)
//   latch WORD OE NANOS  the relay chain's latch rose: WORD is the last bytes
//                        shifted out on SPI0 (hex, first byte sent first); the
//                        simulation waits for "resume" so the readings that
//                        follow already see the new relays
//   oe 0|1 NANOS         the relay chain's output enable changed
//   wdt NANOS            the watchdog fired: the chip restarts, flash kept
//   t NANOS              simulated time, about every 50 ms of it
//   fs HEX               the flash file system (answer to dump)
// UART0 bytes from the host are fed at the UART's own baud rate, 10 bits a byte,
// so the chip's 32-byte receive FIFO sees them as a real line would.
// PINS_JSON may carry "xip_penalty": cycles charged into the chip's clock for
// each miss of a model of the RP2040's XIP flash cache (16 KB, 2-way set
// associative, 8-byte lines, LRU; the model of ../shared/rp2040/run_rp2_xip.mjs,
// whose README gives 56 cycles as a fair estimate for the Pico's default flash
// clock).  rp2040js itself charges nothing for a fetch from flash.  Absent or
// negative: no model.  "xip MISSES READS" answers the command "xip".
import fs from 'fs';
import net from 'net';
import { decodeBlock } from 'uf2';
import { Simulator, USBCDC, ConsoleLogger, LogLevel } from 'rp2040js';
import { bootromB1 } from './bootrom_b1.mjs';

const [uf2Path, fsPath, ctlPort, pinsArg] = process.argv.slice(2);
const pins = Object.assign({ relay_latch: 17, relay_oe: 13, freq_in: 21, uart: 0 }, JSON.parse(pinsArg || '{}'));
const FLASH_FS_START = 0xa0000; // 2 MB flash - MICROPY_HW_FLASH_STORAGE_BYTES (1408 KB)
const XIP_PEN = typeof pins.xip_penalty === 'number' ? pins.xip_penalty : -1;

// The XIP cache model: 1024 sets of 2 ways, 8-byte lines, LRU.
const XIP_SETS = 1024;
const xipTags = new Int32Array(XIP_SETS * 2).fill(-1);
const xipLru = new Uint8Array(XIP_SETS);
let xipReads = 0, xipMisses = 0, xipPend = 0;
function xipTouch(addr) {
  const line = (addr - 0x10000000) >>> 3;
  const set = line & (XIP_SETS - 1);
  const tag = line >>> 10;
  const b = set * 2;
  xipReads++;
  if (xipTags[b] === tag) { xipLru[set] = 1; return; }
  if (xipTags[b + 1] === tag) { xipLru[set] = 0; return; }
  xipMisses++; xipPend++;
  const way = xipLru[set];
  xipTags[b + way] = tag;
  xipLru[set] = 1 - way;
}
function attachXip(mcu) {
  if (XIP_PEN < 0) return;
  xipTags.fill(-1);
  for (const fn of ['readUint8', 'readUint16', 'readUint32']) {
    const orig = mcu[fn].bind(mcu);
    mcu[fn] = (a) => { if (a >= 0x10000000 && a < 0x11000000) xipTouch(a); return orig(a); };
  }
  const core = mcu.core;
  const exec = core.executeInstruction.bind(core);
  // The miss's cycles go into the instruction's count, so the clock (and the
  // target's ticks_us) sees them.
  core.executeInstruction = () => { xipPend = 0; const c = exec(); return c + xipPend * XIP_PEN; };
}

const flash = new Uint8Array(2 * 1024 * 1024).fill(0xff);
const uf2 = fs.readFileSync(uf2Path);
for (let off = 0; off + 512 <= uf2.length; off += 512) {
  const { flashAddress, payload } = decodeBlock(uf2.subarray(off, off + 512));
  flash.set(payload, flashAddress - 0x10000000);
}
if (fsPath && fsPath !== '-') flash.set(fs.readFileSync(fsPath), FLASH_FS_START);

const sock = net.connect(Number(ctlPort), '127.0.0.1');
sock.setNoDelay(true);
const say = (s) => sock.write(s + '\n');
const hex = (bytes) => Buffer.from(bytes).toString('hex');

let sim = null;
let cdc = null;
let spiBytes = [];
let freqHz = 0;
let freqAlarm = null;
let freqLevel = false;
let adcValues = [0, 0, 0, 0, 0];
const pinDrive = {};
let replQueue = [];
let replReady = false;
let lastT = 0;
const uartQueue = [];
let uartAlarm = null;
let uartBusy = false;

function uartNext() {
  const u = sim.rp2040.uart[pins.uart];
  if (!uartQueue.length) { uartBusy = false; return; }
  u.feedByte(uartQueue.shift());
  const baud = u.baudRate > 0 ? u.baudRate : 115200;
  uartAlarm.schedule(10 * 1e9 / baud);
}

function boot() {
  if (sim) sim.stop();
  sim = new Simulator();
  const mcu = sim.rp2040;
  mcu.loadBootrom(bootromB1);
  mcu.logger = new ConsoleLogger(LogLevel.Error);
  mcu.flash.set(flash);   // the flash survives a watchdog reset
  attachFlash(mcu);
  attachXip(mcu);
  mcu.adc.channelValues = adcValues;
  cdc = new USBCDC(mcu.usbCtrl);
  replReady = false;
  let seen = '';
  cdc.onDeviceConnected = () => { cdc.sendSerialByte(13); cdc.sendSerialByte(10); };
  cdc.onSerialData = (value) => {
    say('cdc ' + hex(value));
    if (!replReady) {
      seen = (seen + Buffer.from(value).toString('latin1')).slice(-16);
      if (seen.endsWith('>>> ')) {
        replReady = true;
        flushRepl();
      }
    }
  };
  const spi = mcu.spi[0];
  spi.onTransmit = (v) => { spiBytes.push(v & 0xff); if (spiBytes.length > 16) spiBytes.shift(); spi.completeTransmit(0); };
  for (const u of mcu.uart) {
    // rp2040js 1.4.1 raises the UART's transmit interrupt on every check, so a
    // driver that unmasks it (MicroPython's does) never leaves its handler.  As on
    // the chip: the transmit interrupt is raised when a byte has gone out (the
    // FIFO drained) and cleared by the interrupt-clear register.
    u.checkInterrupts = function () {
      this.rp2040.setInterrupt(this.irq, !!(this.interruptStatus & this.interruptMask));
    };
    const write = u.writeUint32.bind(u);
    u.writeUint32 = function (offset, value) {
      write(offset, value);
      if (offset === 0) { this.interruptStatus |= 1 << 5; this.checkInterrupts(); }  // UARTDR: TXINTR
    };
  }
  // rp2040js 1.4.1 tests the PWM pin direction with "&&" for "&", so a B input
  // never counts an edge while any other pin is an output: the same check, right.
  mcu.pwm.gpioOnInput = function (index) {
    if (this.gpioDirection & (1 << index)) return;
    for (const channel of this.channels) {
      if (channel.pinB1 === index || channel.pinB2 === index) channel.gpioBChanged();
    }
  };
  const uart = mcu.uart[pins.uart];
  uart.onByte = (v) => say('uart ' + hex([v]));
  mcu.gpio[pins.relay_latch].addListener((state, old) => {
    if (state === 1 && old !== 1) {
      const oe = mcu.gpio[pins.relay_oe].value === 1 ? 1 : 0;
      say(`latch ${hex(spiBytes)} ${oe} ${Math.round(sim.clock.nanos)}`);
      spiBytes = [];
      sim.stop();
    }
  });
  mcu.gpio[pins.relay_oe].addListener((state) => say(`oe ${state === 1 ? 1 : 0} ${Math.round(sim.clock.nanos)}`));
  mcu.peripherals[0x40058].onWatchdogTrigger = () => {   // WATCHDOG_BASE
    say(`wdt ${Math.round(sim.clock.nanos)}`);
    flash.set(mcu.flash.subarray(0, flash.length));
    setImmediate(boot);
  };
  for (const [g, v] of Object.entries(pinDrive)) mcu.gpio[Number(g)].setInputValue(v);
  freqAlarm = sim.clock.createAlarm(toggle);
  uartAlarm = sim.clock.createAlarm(uartNext);
  uartBusy = false;
  if (freqHz > 0) startWave();
  mcu.core.PC = 0x10000000;
  say(`booted ${Math.round(sim.clock.nanos)}`);
  run();
}

// The QSPI flash behind the SSI, as far as MicroPython's flash writes need it:
// rp2040js 1.4.1 emulates flash only for reads (XIP), and leaves IO_QSPI (the
// chip select the boot ROM's flash routines force) unimplemented.  Commands, by
// the usual serial NOR flash set (a W25Q16JV-like part): 06 write enable,
// 05/35 status (never busy), 02 page program (bits only cleared, within the
// 256-byte page), 20/52/D8 erase 4/32/64 KB, C7/60 chip erase, 03/0B read,
// 9F JEDEC id, 4B unique id; status register 2 reads with its quad-enable bit
// set, so the boot stage 2 never rewrites it.  A command is the bytes between
// chip-select low and high: forced by the boot ROM's routines through IO_QSPI,
// or driven by the SSI itself, which lets it go when its transmit FIFO has
// emptied (the code then polls the status register: that ends the command).
function attachFlash(mcu) {
  const ssi = mcu.peripherals[0x18000];
  const ioq = mcu.peripherals[0x40018];
  const flash = mcu.flash;
  const regs = {};
  const rx = [];
  let cmd = [];
  let cs = 1;
  let forced = false;
  const addr = (k) => ((cmd[k] << 16) | (cmd[k + 1] << 8) | cmd[k + 2]) >>> 0;
  function respond(n) {
    const c = cmd[0];
    if (c === 0x03 && n >= 4) return flash[(addr(1) + n - 4) % flash.length];
    if (c === 0x0b && n >= 5) return flash[(addr(1) + n - 5) % flash.length];
    if (c === 0x9f) return [0xef, 0x40, 0x15][n - 1] || 0;
    if (c === 0x35 && n >= 1) return 0x02;
    if (c === 0x4b && n >= 5) return [0xfe, 0xed, 0x0b, 0x0a, 0x71, 0x2f, 0x15, 0x26][(n - 5) & 7];
    return 0;
  }
  function endCmd() {
    const c = cmd[0];
    if (c === 0x02 && cmd.length > 4) {
      const a = addr(1);
      for (let i = 0; i < cmd.length - 4; i++) {
        const at = ((a & ~0xff) | ((a + i) & 0xff)) % flash.length;
        flash[at] &= cmd[4 + i];
      }
    } else if ((c === 0x20 || c === 0x52 || c === 0xd8) && cmd.length >= 4) {
      const size = c === 0x20 ? 4096 : c === 0x52 ? 32768 : 65536;
      const a = addr(1) & ~(size - 1);
      flash.fill(0xff, a, Math.min(a + size, flash.length));
    } else if (c === 0xc7 || c === 0x60) {
      flash.fill(0xff);
    }
    cmd = [];
  }
  ioq.readUint32 = (off) => regs[off] || 0;
  ioq.writeUint32 = (off, v) => {
    regs[off] = v;
    if (off === 0x0c) {                  // GPIO_QSPI_SS_CTRL: OUTOVER in bits 8-9
      const over = (v >> 8) & 3;
      const level = over === 2 ? 0 : 1;  // 2: drive low; otherwise idle high
      if (level === 1 && cs === 0) endCmd();
      if (level === 0 && cs === 1) cmd = [];
      cs = level;
      forced = over >= 2;
    }
  };
  const ssiRead = ssi.readUint32.bind(ssi);
  const ssiWrite = ssi.writeUint32.bind(ssi);
  ssi.readUint32 = (off) => {
    if (off === 0x60) return rx.length ? rx.shift() : 0;         // DR0
    if (off === 0x28) {                                          // SR: TFNF, TFE, RFNE
      if (!forced && cmd.length) endCmd();
      return 0x6 | (rx.length ? 0x8 : 0);
    }
    if (off === 0x24) return rx.length;                          // RXFLR
    if (off === 0x20) return 0;                                  // TXFLR: sent at once
    return ssiRead(off);
  };
  ssi.writeUint32 = (off, v) => {
    if (off === 0x08) {                                          // SSIENR: FIFOs cleared
      rx.length = 0;
      if (!forced) cmd = [];
    }
    if (off === 0x60) {
      cmd.push(v & 0xff);
      rx.push(respond(cmd.length - 1));
      return;
    }
    ssiWrite(off, v);
  };
}

// The counter pin's square wave: each edge at its own time on a fixed grid
// (an alarm fires at the first instruction after its time; rescheduling from
// there would stretch every period by that overshoot).
let freqNext = 0;
function toggle() {
  if (freqHz <= 0) return;
  freqLevel = !freqLevel;
  sim.rp2040.gpio[pins.freq_in].setInputValue(freqLevel);
  const half = 5e8 / freqHz;
  const now = sim.clock.nanos;
  freqNext = freqNext + half > now ? freqNext + half : now + half;
  freqAlarm.schedule(freqNext - now);
}
function startWave() {
  freqNext = sim.clock.nanos + 5e8 / freqHz;
  freqAlarm.schedule(5e8 / freqHz);
}

function run() {
  sim.execute();
}

setInterval(() => {
  if (sim && sim.clock.nanos - lastT > 5e7) {
    lastT = Math.round(sim.clock.nanos);
    say('t ' + lastT);
  }
}, 20);

function flushRepl() {
  while (replReady && replQueue.length) {
    for (const ch of replQueue.shift() + '\r\n') cdc.sendSerialByte(ch.charCodeAt(0));
  }
}

let buf = '';
sock.on('data', (d) => {
  buf += d.toString('latin1');
  let i;
  while ((i = buf.indexOf('\n')) >= 0) {
    const line = buf.slice(0, i);
    buf = buf.slice(i + 1);
    const sp = line.indexOf(' ');
    const cmd = sp < 0 ? line : line.slice(0, sp);
    const arg = sp < 0 ? '' : line.slice(sp + 1);
    if (cmd === 'repl') { replQueue.push(arg); flushRepl(); }
    else if (cmd === 'cdc') { for (const b of Buffer.from(arg, 'hex')) cdc.sendSerialByte(b); }
    else if (cmd === 'uart') {
      for (const b of Buffer.from(arg, 'hex')) uartQueue.push(b);
      if (!uartBusy) { uartBusy = true; uartNext(); }
    }
    else if (cmd === 'dump') {
      flash.set(sim.rp2040.flash.subarray(0, flash.length));
      say('fs ' + Buffer.from(flash.subarray(FLASH_FS_START)).toString('hex'));
    }
    else if (cmd === 'adc') { const [ch, v] = arg.split(' ').map(Number); adcValues[ch] = v; }
    else if (cmd === 'freq') {
      const f = Number(arg);
      const was = freqHz;
      freqHz = f;
      if (f > 0 && was <= 0) startWave();
    }
    else if (cmd === 'pin') { const [g, v] = arg.split(' ').map(Number); pinDrive[g] = !!v; sim.rp2040.gpio[g].setInputValue(!!v); }
    else if (cmd === 'resume') { if (!sim.executing) run(); }
    else if (cmd === 'quit') { sim.stop(); sock.end(); process.exit(0); }
  }
});
sock.on('close', () => process.exit(0));
sock.on('error', () => process.exit(1));
sock.on('connect', boot);
