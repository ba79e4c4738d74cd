//! The design table reader.
#![no_main]

use libfuzzer_sys::fuzz_target;
use plotsieve_stages::ingest::read_design;

fuzz_target!(|data: &[u8]| {
    let p = std::env::temp_dir().join(format!("plotsieve-fuzz-{}-design.csv", std::process::id()));
    std::fs::write(&p, data).expect("a temporary file");
    let _ = read_design(&p, "design.csv");
});
