//! The trial-file loader (defaults, the file, a `--set` override).
#![no_main]

use libfuzzer_sys::fuzz_target;
use plotsieve_stages::config::TrialConfig;

fuzz_target!(|data: &[u8]| {
    let text = String::from_utf8_lossy(data);
    let _ = TrialConfig::from_toml(&text, "trial.toml", &["clean.speed.min_m_s=0.8".into()]);
});
