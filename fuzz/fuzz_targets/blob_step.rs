//! Any bytes -> `Blob::parse`; when a blob parses, `inspect`, `codegen` and a
//! few steps of the model (and of its detector) on inputs derived from the
//! bytes. The bytes are tried as given and re-sealed (total length and CRC
//! fixed up), so mutations reach the structural checks behind the CRC.
#![no_main]

use lapwing::model::{Blob, CRC, HEADER_LEN};
use lapwing_fuzz::{step_blob, Rng};
use lapwing_tools::blob::AlignedBytes;
use libfuzzer_sys::fuzz_target;

fn try_blob(bytes: &[u8], rng: &mut Rng) {
    let aligned = AlignedBytes::from_bytes(bytes);
    let Ok(blob) = Blob::parse(aligned.bytes()) else { return };
    let info = lapwing_tools::inspect::inspect(&blob);
    let _ = info.to_text();
    let _ = lapwing_tools::codegen::module(aligned.bytes(), &info, "fuzz.lwq");
    step_blob(&blob, rng, 16);
}

fuzz_target!(|data: &[u8]| {
    let mut rng = Rng::from_bytes(data);
    try_blob(data, &mut rng);
    if data.len() >= HEADER_LEN + 4 {
        let mut sealed = data.to_vec();
        let n = sealed.len();
        sealed[20..24].copy_from_slice(&(n as u32).to_le_bytes());
        let crc = CRC.checksum(&sealed[..n - 4]);
        sealed[n - 4..].copy_from_slice(&crc.to_le_bytes());
        try_blob(&sealed, &mut rng);
    }
});
