//! The panic-free link proof (DESIGN.md section 9): the core's
//! `Blob::parse` and `QModel::step`, linked with fat LTO and a panic
//! handler that calls a function nobody defines. If any panic path
//! survives optimisation, the link fails naming that symbol
//! (`lapwing_panic_path_exists`); if it links, no code path of parse or
//! step can panic.
//!
//! The optimiser must not see the blob, the buffers or their lengths, or it
//! could drop checks that only this one model makes dead: they all pass
//! through `black_box`, so every scheme, cell width, head and layer count
//! the parser accepts stays reachable. Nothing here prints (formatting has
//! panic paths of its own); the result is the exit status (0: the blob
//! parsed and every step succeeded).
//!
//! Features: `canary` adds an index that may panic, so the link must fail
//! (a check that the proof can fail); `diagnose` defines the panic handler,
//! so a failing proof links and the disassembly shows the callers of
//! `core::panicking`.
#![no_std]
#![no_main]

use core::hint::black_box;
use cortex_m_rt::entry;
use cortex_m_semihosting::debug;
use lapwing::model::Blob;
use lapwing::quant::StateBuf;
use lapwing_firmware::model;

/// Steps run on an all-zero input (the proof is the link; running it shows
/// the build works).
const STEPS: usize = 16;

/// The model's state, where firmware keeps it: in a `static` (so the
/// ELF's RAM figure includes it).
static mut STATE: StateBuf<{ model::STATE_WORDS }> = StateBuf::new();

#[inline(never)]
fn check() -> bool {
    let bytes: &'static [u8] = black_box(&model::BLOB.0[..]);
    let Ok(blob) = Blob::parse(bytes) else { return false };
    let m = blob.model();
    // SAFETY: the only reference to STATE, taken once, single-threaded.
    let state_buf = unsafe { &mut *core::ptr::addr_of_mut!(STATE) };
    let Some(state) = state_buf.words_mut(model::STATE_WORDS) else { return false };
    let mut y = [0i16; model::OUTPUTS];
    let x = [0i16; model::INPUTS];
    for _ in 0..black_box(STEPS) {
        let state: &mut [i16] = black_box(&mut state[..]);
        let y: &mut [i16] = black_box(&mut y[..]);
        if m.step(state, black_box(&x[..]), y).is_err() {
            return false;
        }
    }
    #[cfg(feature = "canary")]
    {
        let y: &[i16] = black_box(&y[..]);
        if y[black_box(usize::MAX)] != 0 {
            return false;
        }
    }
    black_box(&y);
    true
}

#[entry]
fn main() -> ! {
    debug::exit(if check() { debug::EXIT_SUCCESS } else { debug::EXIT_FAILURE });
    loop {}
}

#[cfg(not(feature = "diagnose"))]
#[panic_handler]
fn panic(_: &core::panic::PanicInfo<'_>) -> ! {
    extern "C" {
        /// Defined nowhere: referencing it fails the link.
        fn lapwing_panic_path_exists() -> !;
    }
    // SAFETY: never runs; the link fails first if this is reachable.
    unsafe { lapwing_panic_path_exists() }
}

#[cfg(feature = "diagnose")]
#[panic_handler]
fn panic(_: &core::panic::PanicInfo<'_>) -> ! {
    debug::exit(debug::EXIT_FAILURE);
    loop {}
}
