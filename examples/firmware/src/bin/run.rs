//! The measurement firmware: runs the generated model over the compiled-in
//! `int16` input sequence with the core's `QModel::step`, prints every
//! output row over semihosting, then the measurements, and exits with
//! status 0 (all steps ran) or 1.
//!
//! Output protocol (one line each, parsed by tools/examples/firmware_loop.rs):
//! ```text
//! LWFW 1
//! info target=.. board=.. cpu=.. config=.. inputs=X outputs=Y state_words=N macs=M blob_bytes=B steps=T window=K
//! calib iterations=I instructions=2I ticks=D      # SysTick ticks for 2I instructions
//! timer windows=64 ticks=E                        # 64 empty windows (timer read overhead)
//! parse ticks=P                                   # one Blob::parse, CRC included
//! R t y0 y1 ..                                    # one per step: the raw int16 outputs
//! time steps=T windows=W ticks=S                  # sum over the W windows of K steps
//! stack step_bytes=.. parse_bytes=.. free_bytes=..
//! done
//! ```
//! Printing happens between timing windows, never inside one. The stack
//! high-water is taken in a second pass over the whole sequence with the
//! timer stopped (no interrupt runs at any time).
#![no_std]
#![no_main]

use core::fmt::{self, Write as _};
use cortex_m_rt::{entry, exception, ExceptionFrame};
use cortex_m_semihosting::{debug, hio};
use lapwing::model::Blob;
use lapwing::quant::{QModel, StateBuf};
use lapwing_firmware::{inputs, model, stack, systick, BOARD, CPU, TARGET};

/// Steps per timing window: enough to average the timer's one-tick
/// resolution away, few enough that the rows fit a small buffer (the
/// micro:bit has 16 KiB of RAM).
const WINDOW: usize = {
    let k = 512 / model::OUTPUTS;
    if k == 0 {
        1
    } else if k > 50 {
        50
    } else {
        k
    }
};

/// Calibration loop lengths; their difference cancels the call overhead.
const CAL: (u32, u32) = (50_000, 150_000);

static mut STATE: StateBuf<{ model::STATE_WORDS }> = StateBuf::new();
static mut ROWS: [[i16; model::OUTPUTS]; WINDOW] = [[0; model::OUTPUTS]; WINDOW];

/// One output line, sent with a single semihosting write.
struct Line {
    buf: [u8; 768],
    len: usize,
}

impl fmt::Write for Line {
    fn write_str(&mut self, s: &str) -> fmt::Result {
        let end = self.len + s.len();
        let dst = self.buf.get_mut(self.len..end).ok_or(fmt::Error)?;
        dst.copy_from_slice(s.as_bytes());
        self.len = end;
        Ok(())
    }
}

struct Out {
    host: hio::HostStream,
    line: Line,
}

impl Out {
    fn send(&mut self, args: fmt::Arguments<'_>) {
        self.line.len = 0;
        if self.line.write_fmt(args).is_err() {
            self.line.len = 0;
            let _ = self.line.write_str("error line too long");
        }
        let _ = self.line.write_str("\n");
        let _ = self.host.write_all(self.line.buf.get(..self.line.len).unwrap_or(&[]));
    }
}

macro_rules! say {
    ($out:expr, $($arg:tt)*) => { $out.send(format_args!($($arg)*)) };
}

/// The measured call: one step of the model. Not inlined, so the stack
/// high-water sees its whole frame.
#[inline(never)]
fn do_step(m: &QModel<'_>, state: &mut [i16], x: &[i16], y: &mut [i16]) -> Result<(), lapwing::Error> {
    m.step(state, x, y)
}

/// Parsing, kept out of line for the same reason.
#[inline(never)]
fn do_parse(bytes: &'static [u8]) -> Result<Blob<'static>, lapwing::Error> {
    Blob::parse(core::hint::black_box(bytes))
}

fn run(out: &mut Out) -> Result<(), &'static str> {
    say!(out, "LWFW 1");
    say!(
        out,
        "info target={TARGET} board={BOARD} cpu={CPU} config={} inputs={} outputs={} state_words={} macs={} \
         blob_bytes={} steps={} window={WINDOW}",
        inputs::CONFIG,
        model::INPUTS,
        model::OUTPUTS,
        model::STATE_WORDS,
        model::MACS_PER_STEP,
        model::BLOB_LEN,
        inputs::STEPS,
    );

    systick::start();
    let time = |f: &dyn Fn()| {
        let t0 = systick::now();
        f();
        systick::elapsed(t0, systick::now())
    };
    let d1 = time(&|| systick::spin(CAL.0));
    let d2 = time(&|| systick::spin(CAL.1));
    if d2 <= d1 {
        return Err("SysTick does not advance on this board (no core clock?)");
    }
    say!(out, "calib iterations={} instructions={} ticks={}", CAL.1 - CAL.0, 2 * (CAL.1 - CAL.0), d2 - d1);
    let mut empty = 0u32;
    for _ in 0..64 {
        let t0 = systick::now();
        empty += systick::elapsed(t0, systick::now());
    }
    say!(out, "timer windows=64 ticks={empty}");

    let t0 = systick::now();
    let parsed = do_parse(&model::BLOB.0);
    let parse_ticks = systick::elapsed(t0, systick::now());
    let blob = match parsed {
        Ok(b) => b,
        Err(e) => {
            say!(out, "error parse: {e}");
            return Err("the blob did not parse");
        }
    };
    say!(out, "parse ticks={parse_ticks}");
    let m = blob.model();
    if m.macs_per_step() != model::MACS_PER_STEP || m.state_words() != model::STATE_WORDS {
        return Err("the parsed model disagrees with the module's constants");
    }

    // SAFETY: single-threaded, no interrupt touches these; the only
    // references to them are these two, taken once.
    let (state_buf, rows) = unsafe { (&mut *core::ptr::addr_of_mut!(STATE), &mut *core::ptr::addr_of_mut!(ROWS)) };
    let state = state_buf.words_mut(model::STATE_WORDS).ok_or("state buffer too small")?;

    // Pass 1: every output row, and the time of the steps.
    let (mut ticks, mut windows, mut t) = (0u64, 0u32, 0usize);
    for chunk in inputs::INPUT.chunks(WINDOW) {
        let t0 = systick::now();
        for (x, y) in chunk.iter().zip(rows.iter_mut()) {
            if let Err(e) = do_step(m, state, x, y) {
                say!(out, "error step: {e}");
                return Err("a step failed");
            }
        }
        ticks += systick::elapsed(t0, systick::now()) as u64;
        windows += 1;
        for y in rows.iter().take(chunk.len()) {
            out.line.len = 0;
            let _ = write!(out.line, "R {t}");
            for v in y {
                let _ = write!(out.line, " {v}");
            }
            let _ = out.line.write_str("\n");
            let _ = out.host.write_all(out.line.buf.get(..out.line.len).unwrap_or(&[]));
            t += 1;
        }
    }
    say!(out, "time steps={t} windows={windows} ticks={ticks}");
    let last = rows.get((inputs::STEPS + WINDOW - 1) % WINDOW).copied();

    // Pass 2: stack high-water of the step over the whole sequence, and of
    // the parse; the timer is stopped, no interrupt can add a frame.
    systick::stop();
    state_buf.reset();
    let state = state_buf.words_mut(model::STATE_WORDS).ok_or("state buffer too small")?;
    let mut y = [0i16; model::OUTPUTS];
    let (ok, step_bytes) = stack::high_water(|| inputs::INPUT.iter().all(|x| do_step(m, state, x, &mut y).is_ok()));
    if !ok || Some(y) != last {
        return Err("the second pass differs from the first");
    }
    let (parsed, parse_bytes) = stack::high_water(|| do_parse(&model::BLOB.0).is_ok());
    if !parsed {
        return Err("the blob did not parse the second time");
    }
    let free = stack::sp() - stack::bottom();
    say!(out, "stack step_bytes={step_bytes} parse_bytes={parse_bytes} free_bytes={free}");
    say!(out, "done");
    Ok(())
}

#[entry]
fn main() -> ! {
    let Ok(host) = hio::hstdout() else {
        debug::exit(debug::EXIT_FAILURE);
        loop {}
    };
    let mut out = Out { host, line: Line { buf: [0; 768], len: 0 } };
    let status = match run(&mut out) {
        Ok(()) => debug::EXIT_SUCCESS,
        Err(e) => {
            say!(out, "error {e}");
            debug::EXIT_FAILURE
        }
    };
    debug::exit(status);
    loop {}
}

#[exception]
unsafe fn HardFault(ef: &ExceptionFrame) -> ! {
    if let Ok(host) = hio::hstdout() {
        let mut out = Out { host, line: Line { buf: [0; 768], len: 0 } };
        say!(out, "error hard fault at pc={:#010x}", ef.pc());
    }
    debug::exit(debug::EXIT_FAILURE);
    loop {}
}

#[panic_handler]
fn panic(info: &core::panic::PanicInfo<'_>) -> ! {
    if let Ok(host) = hio::hstdout() {
        let mut out = Out { host, line: Line { buf: [0; 768], len: 0 } };
        say!(out, "error panic: {info}");
    }
    debug::exit(debug::EXIT_FAILURE);
    loop {}
}
