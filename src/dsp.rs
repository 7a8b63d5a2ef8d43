//! Dot products for Arm cores with the DSP extension (Cortex-M4, M7, and
//! M33/M35P/M55 built with a DSP-capable `target-cpu`): int8 weights
//! widened two at a time with `sxtb16` and multiplied two at a time with
//! `smlad`, four gate rows per pass so each activation word serves four
//! rows. LLVM emits neither instruction from portable Rust (it pairs only
//! 16-bit loads), hence `asm!`: the w8a16 loop is one block (LLVM's loops
//! around one-instruction blocks spilled), w8a8 uses one-instruction
//! blocks in a Rust loop.
//!
//! Compiled only when the build script sets `lapwing_dsp` (see `build.rs`:
//! `thumbv7em-*` targets always, `thumbv8m.main-*` when the build names a
//! DSP-capable CPU or the `arm-dsp` feature is on). On a core without the
//! extension the assembler rejects `sxtb16`, so a wrong setting fails the
//! build and never runs.
//!
//! The sums are the exact integers of the portable kernels
//! (`quant::Weight`): every product and partial sum of a validated row fits
//! `i32` (the bound the constructors prove for the portable `i32`
//! accumulator), so no addition wraps and the order of additions does not
//! matter. `tools/firmware/check.sh` proves it on every run: the emulated
//! Cortex-M4 and M33 outputs are compared bit for bit with the host's
//! portable path over 2,000 steps, for w8a16 and w8a8.
#![allow(unsafe_code)]

use core::arch::asm;

/// Sign-extends bytes 0 and 2 of `x` into the two halfwords of the result.
#[inline(always)]
fn sxtb16(x: u32) -> u32 {
    let r: u32;
    // SAFETY: `sxtb16` reads one general register and writes one; it
    // touches no memory (`nomem`), no stack (`nostack`) and no flags
    // (`preserves_flags`: it is not a flag-setting instruction), and its
    // result depends only on `x` (`pure`). Every bit pattern of `x` is a
    // valid input and every result a valid `u32`.
    unsafe {
        asm!("sxtb16 {r}, {x}", r = lateout(reg) r, x = in(reg) x, options(pure, nomem, nostack, preserves_flags));
    }
    r
}

/// Sign-extends bytes 1 and 3 of `x` into the two halfwords of the result.
#[inline(always)]
fn sxtb16_ror8(x: u32) -> u32 {
    let r: u32;
    // SAFETY: as `sxtb16`; the rotation is part of the same instruction.
    unsafe {
        asm!("sxtb16 {r}, {x}, ror #8", r = lateout(reg) r, x = in(reg) x, options(pure, nomem, nostack, preserves_flags));
    }
    r
}

/// `acc + lo(a) * lo(b) + hi(a) * hi(b)` on the signed halfwords.
#[inline(always)]
fn smlad(a: u32, b: u32, acc: i32) -> i32 {
    let r: i32;
    // SAFETY: `smlad` reads three general registers and writes one; no
    // memory, no stack, result a function of the inputs only. It sets the
    // sticky Q flag when the accumulation overflows, so `preserves_flags`
    // is not claimed; the callers' sums never overflow (module docs), and
    // nothing in this crate reads Q.
    unsafe {
        asm!("smlad {r}, {a}, {b}, {c}", r = lateout(reg) r, a = in(reg) a, b = in(reg) b, c = in(reg) acc,
             options(pure, nomem, nostack));
    }
    r
}

/// The little-endian word of four bytes.
#[inline(always)]
fn word(c: &[i8; 4]) -> u32 {
    u32::from_le_bytes(c.map(|b| b as u8))
}

/// An activation element the kernels take: `i16` (w8a16) or `i8` (w8a8).
pub(crate) trait DspAct: Copy + Into<i32> {
    /// The exact sums over the first `4 * (v.len() / 4)` columns of four
    /// rows at least as long as `v`.
    fn dot4_chunks(w: [&[i8]; 4], v: &[Self]) -> [i32; 4];
}

impl DspAct for i16 {
    /// The whole loop in one `asm!` block: LLVM's own loops over these
    /// operations spill and recompute addresses (3-4 instructions per
    /// multiply-accumulate, measured), this one takes 26 instructions per
    /// 16 (four columns of four rows): two activation loads and two
    /// `pkhbt`/`pkhtb` shared by the rows, then per row one weight load,
    /// two `sxtb16` and two `smlad`.
    #[inline(always)]
    fn dot4_chunks(w: [&[i8]; 4], v: &[i16]) -> [i32; 4] {
        let chunks = w.iter().fold(v.len(), |m, r| m.min(r.len())) / 4;
        let [mut s0, mut s1, mut s2, mut s3] = [0i32; 4];
        if chunks == 0 {
            return [0; 4];
        }
        let [mut p0, mut p1, mut p2, mut p3] = w.map(|r| r.as_ptr());
        let (mut pv, mut left) = (v.as_ptr(), chunks);
        // SAFETY: the block reads `4 * chunks` elements from the start of
        // `v` and of each row (`chunks` iterations, each advancing the
        // activation pointer by 8 bytes and each row pointer by 4), and
        // `chunks` is at most a quarter of the shortest of the five
        // lengths, so every read is inside a live shared slice of
        // initialised integers; nothing is written to memory (`readonly`).
        // `chunks >= 1`, so the count-down loop ends after `chunks`
        // passes. Words are read with `ldr`, which Armv7-M and Armv8-M
        // Mainline perform at any alignment (as LLVM's own code for these
        // targets assumes); firmware that enables unaligned-access traps
        // must keep `v` and the weight rows 4-byte aligned. The loop needs
        // 14 registers; r7 cannot be an operand (the Thumb frame pointer),
        // so the block pushes it, uses it for the `(v1, v3)` lanes and pops
        // it (restoring r7 and sp) before it ends. It sets the flags (`subs`, and Q in `smlad`, which
        // cannot overflow here: module docs), so `preserves_flags` is not
        // claimed.
        unsafe {
            asm!(
                "push {{r7}}",
                "2:",
                "ldr {a}, [{pv}], #4",
                "ldr {b}, [{pv}], #4",
                "pkhbt {c}, {a}, {b}, lsl #16",
                "pkhtb r7, {b}, {a}, asr #16",
                "ldr {a}, [{p0}], #4",
                "sxtb16 {b}, {a}",
                "smlad {s0}, {b}, {c}, {s0}",
                "sxtb16 {b}, {a}, ror #8",
                "smlad {s0}, {b}, r7, {s0}",
                "ldr {a}, [{p1}], #4",
                "sxtb16 {b}, {a}",
                "smlad {s1}, {b}, {c}, {s1}",
                "sxtb16 {b}, {a}, ror #8",
                "smlad {s1}, {b}, r7, {s1}",
                "ldr {a}, [{p2}], #4",
                "sxtb16 {b}, {a}",
                "smlad {s2}, {b}, {c}, {s2}",
                "sxtb16 {b}, {a}, ror #8",
                "smlad {s2}, {b}, r7, {s2}",
                "ldr {a}, [{p3}], #4",
                "sxtb16 {b}, {a}",
                "smlad {s3}, {b}, {c}, {s3}",
                "sxtb16 {b}, {a}, ror #8",
                "smlad {s3}, {b}, r7, {s3}",
                "subs {left}, {left}, #1",
                "bne 2b",
                "pop {{r7}}",
                pv = inout(reg) pv,
                p0 = inout(reg) p0,
                p1 = inout(reg) p1,
                p2 = inout(reg) p2,
                p3 = inout(reg) p3,
                left = inout(reg) left,
                s0 = inout(reg) s0,
                s1 = inout(reg) s1,
                s2 = inout(reg) s2,
                s3 = inout(reg) s3,
                a = out(reg) _,
                b = out(reg) _,
                c = out(reg) _,
                options(readonly),
            );
        }
        let _ = (pv, p0, p1, p2, p3, left);
        [s0, s1, s2, s3]
    }
}

impl DspAct for i8 {
    /// Int8 activations widen with `sxtb16` too: per four columns one
    /// activation word gives the pairs `(v0, v2)` and `(v1, v3)` that line
    /// up with the weights' `sxtb16` pairs (one-instruction `asm!`
    /// helpers, LLVM's loop; 9.65 -> 8.97 instructions per MAC on the M4 when
    /// it was added).
    fn dot4_chunks(w: [&[i8]; 4], v: &[i8]) -> [i32; 4] {
        let mut acc = [0i32; 4];
        for (k, a) in v.chunks_exact(4).enumerate() {
            let Ok(a) = <&[i8; 4]>::try_from(a) else { continue };
            let a = word(a);
            let (a02, a13) = (sxtb16(a), sxtb16_ror8(a));
            for (s, row) in acc.iter_mut().zip(w) {
                let Some(x) = row.get(4 * k..4 * k + 4).and_then(|c| <&[i8; 4]>::try_from(c).ok()) else { continue };
                let x = word(x);
                *s = smlad(sxtb16_ror8(x), a13, smlad(sxtb16(x), a02, *s));
            }
        }
        acc
    }
}

/// Exact `sum w[g][i] * v[i]` for four int8 rows as long as `v`; `None`
/// when a row's length differs (the caller then takes the portable path,
/// which defines that case).
#[inline(never)]
pub(crate) fn dot4_i8<A: DspAct>(w: [&[i8]; 4], v: &[A]) -> Option<[i32; 4]> {
    let n = v.len();
    if w.iter().any(|r| r.len() != n) {
        return None;
    }
    let mut acc = A::dot4_chunks(w, v);
    // The last `n % 4` columns, one multiply each.
    let tail = n - n % 4;
    let vt = v.get(tail..).unwrap_or(&[]);
    for (s, row) in acc.iter_mut().zip(w) {
        let wt = row.get(tail..).unwrap_or(&[]);
        *s = wt.iter().zip(vt).fold(*s, |s, (p, q)| s.wrapping_add(*p as i32 * (*q).into()));
    }
    Some(acc)
}
