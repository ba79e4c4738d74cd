//! Seeded property test of the input readers: the monitor export reader, the plot GeoJSON
//! reader, the design-table reader, the plot checks and the trial-file loader take thousands
//! of mutated versions of valid inputs (bytes flipped, cut, lines dropped or repeated,
//! fields replaced by awkward values) and must return a value or an error, never panic.
//! Bounded and seeded, so it runs in CI in a few seconds and fails the same way twice.

use crate::config::{TrialConfig, TEST_TRIAL};
use crate::util::Rng;
use std::path::Path;

/// Mutated inputs per reader (x 5 readers; the README gives the total).
pub const PER_READER: usize = 2_500;

const AWKWARD: &[&str] = &[
    "",
    "NaN",
    "inf",
    "-inf",
    "1e308",
    "-1e308",
    "0",
    "-0",
    "nan",
    "1,5",
    "\"",
    "\"\"",
    ",",
    ";",
    "\u{feff}",
    "\u{0}",
    "99999999999999999999",
    "-180.0000001",
    "2026-13-40T25:61:61Z",
    "{}",
    "[]",
    "null",
    "true",
    "[[[]]]",
    "[1]",
    "{\"type\":\"Polygon\"}",
];

/// One mutation of `base`.
fn mutate(base: &[u8], rng: &mut Rng) -> Vec<u8> {
    let mut v = base.to_vec();
    let rounds = 1 + rng.below(4);
    for _ in 0..rounds {
        match rng.below(7) {
            0 if !v.is_empty() => {
                let i = rng.below(v.len());
                v[i] = (rng.next_u64() & 0xff) as u8;
            }
            1 => {
                let n = rng.below(v.len() + 1);
                v.truncate(n);
            }
            2 | 3 => {
                // Replace a field (between delimiters or quotes) by an awkward value.
                let text = String::from_utf8_lossy(&v).to_string();
                let cuts: Vec<usize> = text
                    .char_indices()
                    .filter(|(_, c)| matches!(c, ',' | '\n' | ':' | '"' | '['))
                    .map(|(i, _)| i)
                    .collect();
                if cuts.len() >= 2 {
                    let k = rng.below(cuts.len() - 1);
                    let (a, b) = (cuts[k] + 1, cuts[k + 1]);
                    let word = AWKWARD[rng.below(AWKWARD.len())];
                    v = format!("{}{}{}", &text[..a], word, &text[b..]).into_bytes();
                }
            }
            4 => {
                // Drop or repeat a line.
                let text = String::from_utf8_lossy(&v).to_string();
                let mut lines: Vec<&str> = text.split('\n').collect();
                if !lines.is_empty() {
                    let k = rng.below(lines.len());
                    if rng.below(2) == 0 {
                        lines.remove(k);
                    } else {
                        let l = lines[k];
                        lines.insert(k, l);
                    }
                }
                v = lines.join("\n").into_bytes();
            }
            5 if !v.is_empty() => {
                let i = rng.below(v.len());
                v.insert(i, b"\n,;\"{[-."[rng.below(8)]);
            }
            _ => {
                let i = rng.below(v.len() + 1);
                v.splice(i..i, AWKWARD[rng.below(AWKWARD.len())].bytes());
            }
        }
    }
    v
}

/// Run `read` on `PER_READER` mutations of `base`, each written to `path`; a panic fails
/// the test with the seed and the input.
fn hammer(base: &[u8], path: &Path, seed: u64, read: impl Fn(&Path, &[u8])) {
    let mut rng = Rng::new(seed);
    for k in 0..PER_READER {
        let input = mutate(base, &mut rng);
        std::fs::write(path, &input).unwrap();
        let r = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| read(path, &input)));
        assert!(
            r.is_ok(),
            "panic on mutation {k} (seed {seed}) of {}:\n{}",
            path.display(),
            String::from_utf8_lossy(&input)
        );
    }
}

#[test]
fn readers_survive_mutated_inputs() {
    let dir = std::env::temp_dir().join(format!("plotsieve-robust-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let cfg = TrialConfig::from_toml(TEST_TRIAL, "t.toml", &[])
        .unwrap()
        .for_ingest();
    let export = "t,lon,lat,f,s,w,m\n\
        1790000000,-97.50001,38.20002,10.5,2.1,9.1,17.2\n\
        1790000001,-97.50003,38.20004,10.7,2.2,9.1,17.1\n\
        1790000002,-97.50005,38.20006,10.1,2.0,9.1,17.3\n";
    hammer(export.as_bytes(), &dir.join("m.csv"), 1, |p, _| {
        let f = super::formats::for_file(p);
        let _ = f.check(&cfg, p, "m.csv");
        if let Ok(r) = f.read(&cfg, p, "m.csv", 0) {
            assert_eq!(r.rows, (r.points.len() + r.rejections.len()) as u64);
        }
    });
    hammer(export.as_bytes(), &dir.join("p.csv"), 2, |_, bytes| {
        let _ = super::formats::for_bytes(Path::new("p.csv"), bytes).positions(&cfg, bytes);
    });
    let geojson = r#"{"type":"FeatureCollection","features":[
        {"type":"Feature","properties":{"plot_id":"A-1"},"geometry":{"type":"Polygon","coordinates":[[[-97.5,38.2],[-97.4998,38.2],[-97.4998,38.2003],[-97.5,38.2003],[-97.5,38.2]]]}},
        {"type":"Feature","properties":{"plot_id":2},"geometry":{"type":"MultiPolygon","coordinates":[[[[-97.4997,38.2],[-97.4995,38.2],[-97.4995,38.2003],[-97.4997,38.2003],[-97.4997,38.2]]]]}}]}"#;
    hammer(geojson.as_bytes(), &dir.join("p.geojson"), 3, |p, _| {
        if let Ok(polys) = super::read_geojson(p, "p.geojson", "plot_id") {
            let _ = super::plot_checks::problems(&polys, "p.geojson");
        }
    });
    let design = "plot_id,treatment,block,field\nA-1,CHK,1,A\nA-2,prod,1,A\nA-3,CHK,2,A\n";
    hammer(design.as_bytes(), &dir.join("d.csv"), 4, |p, _| {
        let _ = super::read_design(p, "d.csv");
    });
    hammer(TEST_TRIAL.as_bytes(), &dir.join("t.toml"), 5, |_, bytes| {
        let text = String::from_utf8_lossy(bytes);
        let _ = TrialConfig::from_toml(&text, "t.toml", &["clean.speed.min_m_s=0.8".into()]);
    });
    std::fs::remove_dir_all(&dir).unwrap();
}
