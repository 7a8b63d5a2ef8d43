//! Any text as an error budget and as a demo scenario (the two TOML files a
//! user writes): parsing never panics, errors name the source.
#![no_main]

use lapwing_tools::budget::Budget;
use lapwing_tools::scenario::Scenario;
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else { return };
    if let Err(e) = Budget::from_toml_str(text, "budget.toml") {
        let msg = format!("{e:#}");
        assert!(msg.contains("budget.toml"), "{msg}");
    }
    if let Err(e) = Scenario::from_toml_str(text, "scenario.toml") {
        let msg = format!("{e:#}");
        assert!(msg.contains("scenario.toml"), "{msg}");
    }
});
