//! Harvest intake from an inbox.

use crate::common::*;

#[test]
fn intake_matches_exports_to_trials_and_reruns_only_what_changed() {
    let w = Workdir::new("intake");
    // Two trials about 8 km apart.
    ok(&plotsieve(&w.0, &["simulate", "north", "--seed", "71"]));
    ok(&plotsieve(
        &w.0,
        &[
            "simulate",
            "south",
            "--seed",
            "72",
            "--origin-lon=-97.70",
            "--origin-lat=40.55",
        ],
    ));
    let inbox = w.path("inbox");
    std::fs::create_dir_all(&inbox).unwrap();
    let lines = |p: &str| -> Vec<String> {
        std::fs::read_to_string(w.path(p))
            .unwrap()
            .lines()
            .map(String::from)
            .collect()
    };
    let (na, nb, sa, sb) = (
        lines("north/monitor/field-A.csv"),
        lines("north/monitor/field-B.csv"),
        lines("south/monitor/field-A.csv"),
        lines("south/monitor/field-B.csv"),
    );
    for d in ["north/monitor", "south/monitor"] {
        std::fs::remove_dir_all(w.path(d)).unwrap();
    }
    let write = |name: &str, rows: &[String]| {
        std::fs::write(inbox.join(name), rows.join("\n") + "\n").unwrap()
    };
    let half = nb.len() / 2;
    // Two new exports for the north trial: field A, and the first half of field B.
    write("north-A.csv", &na);
    write("north-B1.csv", &nb[..half]);
    // One export spanning both trials: the rest of north B, then south A.
    let mut span = vec![nb[0].clone()];
    span.extend_from_slice(&nb[half..]);
    span.extend_from_slice(&sa[1..]);
    write("span.csv", &span);
    // One export that matches no trial (north A moved about 40 km east).
    let stray = shift_east(&na, 0.5);
    write("stray.csv", &stray);
    // One truncated file: south B cut in the middle of a line.
    let sb_text = sb.join("\n") + "\n";
    std::fs::write(inbox.join("south-B.csv"), &sb_text[..sb_text.len() / 2]).unwrap();
    // One export dropped a second time under another name.
    write("north-A-copy.csv", &na);
    std::fs::write(w.path("season.toml"), "[season]\nname = \"2026 harvest\"\n[[trial]]\nfile = \"north/trial.toml\"\nout = \"runs/north\"\n[[trial]]\nfile = \"south/trial.toml\"\nout = \"runs/south\"\n").unwrap();
    let before = folder_hashes(&inbox);
    let o = plotsieve(&w.0, &["intake", "inbox", "season.toml"]);
    ok(&o);
    let said = String::from_utf8_lossy(&o.stdout).to_string();
    eprintln!("{said}");
    assert!(said.contains("6 exports in the inbox, 5 new"), "{said}");
    assert!(said.contains("taken: north-A-copy.csv -> north/trial.toml"));
    assert!(said.contains("taken: north-B1.csv -> north/trial.toml"));
    assert!(
        said.contains("taken: span.csv -> north/trial.toml")
            && said.contains("taken: span.csv -> south/trial.toml")
    );
    assert!(said.contains("left in the inbox: stray.csv: matches no trial"));
    assert!(said.contains("left in the inbox: south-B.csv: partial"));
    assert!(
        said.contains("already seen: north-A.csv (same content as north-A-copy.csv, taken)"),
        "{said}"
    );
    assert!(said.contains("reran north/trial.toml") && said.contains("reran south/trial.toml"));
    // Nothing in the inbox changed or went missing.
    let after = folder_hashes(&inbox);
    assert_eq!(before, after);
    // Each trial got exactly its exports, counted once.
    let names = |d: &str| -> Vec<String> {
        let mut v: Vec<String> = std::fs::read_dir(w.path(d))
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().to_string())
            .collect();
        v.sort();
        v
    };
    // Inbox files are taken in name order, so the copy comes first and the original is the
    // one already seen.
    assert_eq!(
        names("north/monitor"),
        ["north-A-copy.csv", "north-B1.csv", "span.csv"]
    );
    assert_eq!(names("south/monitor"), ["span.csv"]);
    let m = json(&w.path("runs/north/manifest.json"));
    assert_eq!(
        m["inputs"].as_array().unwrap().len(),
        6,
        "trial, three exports, plots, design"
    );
    let ingest = json(&w.path("runs/north/1-ingest/summary.json"));
    assert_eq!(
        ingest["count_in"].as_u64().unwrap() as usize,
        (na.len() - 1) + (nb.len() - 1) + (sa.len() - 1)
    );
    let plots = json(&w.path("runs/south/3-plots/summary.json"));
    assert!(
        plots["by_file"]["monitor/span.csv"]["far_from_trial"]
            .as_u64()
            .unwrap()
            > 100,
        "north B records in south's run are far_from_trial"
    );
    let im = json(&w.path("intake-manifest.json"));
    assert_eq!(
        im["exports"].as_object().unwrap().len(),
        5,
        "five distinct contents"
    );
    // A second intake with nothing new does nothing.
    let north_mtime = std::fs::metadata(w.path("runs/north/manifest.json"))
        .unwrap()
        .modified()
        .unwrap();
    let o = plotsieve(&w.0, &["intake", "inbox", "season.toml"]);
    ok(&o);
    let said = String::from_utf8_lossy(&o.stdout);
    assert!(
        said.contains("nothing new") && !said.contains("reran"),
        "{said}"
    );
    // The complete south B arrives: only the south trial reruns.
    std::fs::write(inbox.join("south-B-complete.csv"), &sb_text).unwrap();
    let o = plotsieve(&w.0, &["intake", "inbox", "season.toml"]);
    ok(&o);
    let said = String::from_utf8_lossy(&o.stdout);
    assert!(
        said.contains("taken: south-B-complete.csv -> south/trial.toml")
            && said.contains("reran south/trial.toml")
            && !said.contains("reran north"),
        "{said}"
    );
    assert_eq!(
        north_mtime,
        std::fs::metadata(w.path("runs/north/manifest.json"))
            .unwrap()
            .modified()
            .unwrap()
    );
}

#[test]
fn a_zipped_task_data_set_in_the_inbox_goes_to_its_trial() {
    // Task data comes off a terminal as a zipped TASKDATA folder: intake reads the positions
    // in its time logs, copies the archive to the trial it covers and reruns that trial,
    // which reads each time log as an export. A TASKDATA.XML without its logs is left in the
    // inbox with the reason.
    let w = Workdir::new("intake-taskdata");
    ok(&plotsieve(
        &w.0,
        &[
            "simulate", "north", "--seed", "71", "--form", "taskdata", "--quiet",
        ],
    ));
    let inbox = w.path("inbox");
    std::fs::create_dir_all(&inbox).unwrap();
    let set = w.path("north/monitor/TASKDATA");
    zip_task_data(
        &set,
        &inbox.join("north-harvest.zip"),
        ::zip::CompressionMethod::Stored,
        |_, _| false,
    );
    std::fs::copy(set.join("TASKDATA.XML"), inbox.join("TASKDATA.XML")).unwrap();
    std::fs::remove_dir_all(&set).unwrap();
    std::fs::write(
        w.path("season.toml"),
        "[[trial]]\nfile = \"north/trial.toml\"\nout = \"runs/north\"\n",
    )
    .unwrap();
    let o = plotsieve(&w.0, &["intake", "inbox", "season.toml"]);
    ok(&o);
    let out = String::from_utf8_lossy(&o.stdout);
    assert!(
        out.contains("taken: north-harvest.zip -> north/trial.toml"),
        "{out}"
    );
    assert!(
        out.contains("left in the inbox: TASKDATA.XML") && out.contains("zipped"),
        "{out}"
    );
    assert!(w.path("north/monitor/north-harvest.zip").is_file());
    let s = json(&w.path("runs/north/1-ingest/summary.json"));
    let read_as = s["details"].to_string();
    assert!(
        read_as.contains("north-harvest.zip#TLG00001")
            && read_as.contains("north-harvest.zip#TLG00002"),
        "{read_as}"
    );
    let plots = csv_rows(&w.path("runs/north/3-plots/plots.csv"));
    assert!(plots.iter().filter(|p| p["status"] == "kept").count() >= 40);
}
