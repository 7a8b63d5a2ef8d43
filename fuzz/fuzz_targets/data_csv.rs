//! Any bytes as a `.csv` data file -> `data::read`; what it returns must
//! hold its promises (rectangular, finite, labels 0/1 for every row).
#![no_main]

use lapwing_fuzz::{check_dataset, scratch_file};
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let path = scratch_file("data.csv", data);
    check_dataset(&path);
});
