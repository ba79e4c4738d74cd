//! A monitor export read with the sample trial's column mapping: check, full read (every row
//! kept or rejected) and the positions intake reads must return, never panic.
#![no_main]

use libfuzzer_sys::fuzz_target;
use plotsieve_stages::config::TrialConfig;
use plotsieve_stages::ingest::formats;
use std::path::PathBuf;

const TRIAL: &str = include_str!("../../../sample-input/trial.toml");

fn file() -> PathBuf {
    std::env::temp_dir().join(format!("plotsieve-fuzz-{}.csv", std::process::id()))
}

fuzz_target!(|data: &[u8]| {
    let cfg = TrialConfig::from_toml(TRIAL, "trial.toml", &[]).expect("the sample trial loads");
    let p = file();
    std::fs::write(&p, data).expect("a temporary file");
    let f = formats::for_file(&p);
    let _ = f.check(&cfg, &p, "m.csv");
    if let Ok(r) = f.read(&cfg, &p, "m.csv", 0) {
        assert_eq!(r.rows, (r.points.len() + r.rejections.len()) as u64);
    }
    let _ = formats::for_bytes(&p, data).positions(&cfg, data);
});
