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
import fs from 'fs';
import net from 'net';
import { decodeBlock } from 'uf2';
import { Simulator, USBCDC, ConsoleLogger, LogLevel } from 'rp2040js';
import { bootromB1 } from './bootrom_b1.mjs';

const [uf2Path, fsPath, ctlPort, pinsArg] = process.argv.slice(2);
const pins = Object.assign({ relay_latch: 17, relay_oe: 13, freq_in: 21, uart: 0 }, JSON.parse(pinsArg || '{}'));
const FLASH_FS_START = 0xa0000; // 2 MB flash - MICROPY_HW_FLASH_STORAGE_BYTES (1408 KB)

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

function boot() {
  if (sim) sim.stop();
  sim = new Simulator();
  const mcu = sim.rp2040;
  mcu.loadBootrom(bootromB1);
  mcu.logger = new ConsoleLogger(LogLevel.Error);
  mcu.flash.set(flash);   // the flash survives a watchdog reset
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
  const uart = mcu.uart[pins.uart];
  uart.onByte = (v) => say('uart ' + hex([v]));
  mcu.gpio[pins.relay_latch].addListener((state, old) => {
    if (state === 1 && old !== 1) {
      const oe = mcu.gpio[pins.relay_oe].value === 1 ? 1 : 0;
      say(`latch ${hex(spiBytes)} ${oe} ${sim.clock.nanos}`);
      spiBytes = [];
      sim.stop();
    }
  });
  mcu.gpio[pins.relay_oe].addListener((state) => say(`oe ${state === 1 ? 1 : 0} ${sim.clock.nanos}`));
  mcu.peripherals[0x40058].onWatchdogTrigger = () => {   // WATCHDOG_BASE
    say(`wdt ${sim.clock.nanos}`);
    flash.set(mcu.flash);
    setImmediate(boot);
  };
  for (const [g, v] of Object.entries(pinDrive)) mcu.gpio[Number(g)].setInputValue(v);
  freqAlarm = sim.clock.createAlarm(toggle);
  if (freqHz > 0) freqAlarm.schedule(5e8 / freqHz);
  mcu.core.PC = 0x10000000;
  say(`booted ${sim.clock.nanos}`);
  run();
}

function toggle() {
  if (freqHz <= 0) return;
  freqLevel = !freqLevel;
  sim.rp2040.gpio[pins.freq_in].setInputValue(freqLevel);
  freqAlarm.schedule(5e8 / freqHz);
}

function run() {
  sim.execute();
}

setInterval(() => {
  if (sim && sim.clock.nanos - lastT > 5e7) {
    lastT = sim.clock.nanos;
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
    else if (cmd === 'uart') { const u = sim.rp2040.uart[pins.uart]; for (const b of Buffer.from(arg, 'hex')) u.feedByte(b); }
    else if (cmd === 'adc') { const [ch, v] = arg.split(' ').map(Number); adcValues[ch] = v; }
    else if (cmd === 'freq') {
      const f = Number(arg);
      const was = freqHz;
      freqHz = f;
      if (f > 0 && was <= 0) freqAlarm.schedule(5e8 / f);
    }
    else if (cmd === 'pin') { const [g, v] = arg.split(' ').map(Number); pinDrive[g] = !!v; sim.rp2040.gpio[g].setInputValue(!!v); }
    else if (cmd === 'resume') { if (!sim.executing) run(); }
    else if (cmd === 'quit') { sim.stop(); sock.end(); process.exit(0); }
  }
});
sock.on('close', () => process.exit(0));
sock.on('error', () => process.exit(1));
sock.on('connect', boot);
