//! Real-shaped harvests through the defaults, and inputs that would exhaust the machine:
//! an archive that inflates to a gigabyte, an export larger than the memory, a mass-flow
//! export without speed and already delay-corrected, research plots of 10 m.

use crate::common::*;

#[test]
fn a_task_data_zip_that_inflates_to_a_gigabyte_of_zeros_is_refused_before_it_is_read() {
    // Before: a 1 MB archive whose time log inflates to 1 GB of zero bytes made `check` grow
    // to 24 GB until the kernel killed it. Now the member's declared size and inflation are
    // checked before anything is inflated, and the error names the member. The archive is
    // built here (about 1 MB), not committed.
    let w = Workdir::new("forms-zip-bomb");
    let t = simulate(&w, "td", &["--seed", "2", "--form", "taskdata", "--quiet"]);
    let set = w.path("td/monitor/TASKDATA");
    zip_task_data(
        &set,
        &w.path("td/monitor/harvest.zip"),
        ::zip::CompressionMethod::Deflated,
        |n, z| {
            if n != "TLG00001.BIN" {
                return false;
            }
            let zeros = vec![0u8; 1 << 20];
            for _ in 0..1024 {
                std::io::Write::write_all(z, &zeros).unwrap();
            }
            true
        },
    );
    std::fs::remove_dir_all(&set).unwrap();
    let zip_len = std::fs::metadata(w.path("td/monitor/harvest.zip"))
        .unwrap()
        .len();
    assert!(zip_len < 4 << 20, "{zip_len}");
    let o = plotsieve(&w.0, &["check", t.to_str().unwrap()]);
    assert_eq!(o.status.code(), Some(1));
    let out = printed(&o);
    assert!(
        out.contains("harvest.zip")
            && out.contains("TASKDATA/TLG00001.BIN: declares 1073741824 bytes")
            && out.contains("not read"),
        "{out}"
    );
}

#[test]
fn an_export_too_large_for_this_machine_is_refused_before_it_is_read() {
    // Before: a delimited export was read whole, however large; a harvest too large for the
    // machine was killed by the kernel part-way. Now each export's records are bounded from
    // its size and first lines, and a trial that would need more than
    // ingest.max_memory_share (0.7) of the machine's memory is refused at once, by check and
    // by run, naming the export. The export here is a real one whose file is extended to a
    // quarter of the machine's memory with a hole (sparse: no disk space, nothing written);
    // at about 100 bytes a record it bounds some 1.6 times the machine's memory.
    let w = Workdir::new("forms-too-large");
    let t = simulate(&w, "sim", &["--seed", "2", "--quiet"]);
    let meminfo = read(Path::new("/proc/meminfo"));
    let total_kb: u64 = meminfo
        .lines()
        .find_map(|l| l.strip_prefix("MemTotal:"))
        .unwrap()
        .trim()
        .trim_end_matches("kB")
        .trim()
        .parse()
        .unwrap();
    let p = w.path("sim/monitor/field-B.csv");
    std::fs::OpenOptions::new()
        .write(true)
        .open(&p)
        .unwrap()
        .set_len(total_kb * 1024 / 4)
        .unwrap();
    for cmd in ["check", "run"] {
        let o = plotsieve(&w.0, &[cmd, t.to_str().unwrap(), "--quiet"]);
        assert_eq!(o.status.code(), Some(1), "{cmd}");
        let err = printed(&o);
        assert!(
            err.contains("monitor/field-B.csv: the trial's 2 export(s) hold up to")
                && err.contains("ingest.max_memory_share = 0.7")
                && err.contains("not read"),
            "{cmd}: {err}"
        );
        // Refused before reading: the refusal is the memory check's, not a reader's (the
        // zeros after the real rows would be refused row by row).
        assert!(!err.contains("row "), "{cmd}: {err}");
    }
    // A file with no line end in its first 64 KiB (here: all zeros) is no delimited export.
    std::fs::write(&p, vec![0u8; 100_000]).unwrap();
    let o = plotsieve(&w.0, &["check", t.to_str().unwrap()]);
    let out = printed(&o);
    assert!(
        out.contains("monitor/field-B.csv: no line end in its first 64 KiB"),
        "{out}"
    );
}

#[test]
fn a_wild_export_without_speed_and_already_delay_corrected_comes_out_within_its_truth() {
    // The real-data failings at once on a simulated harvest of known truth: mass flow
    // logged without any speed or distance column (before: refused, "maps neither speed
    // nor distance"; now speed comes from positions and times), and flow already
    // delay-corrected by the software that wrote it (true delay 0). Through the defaults the
    // plot yields are about as close to the truth as the same harvest logged with speed and
    // its usual delay, every product's uplift lies within 3 SD of its true effect, and the
    // report explains the delay estimate near zero.
    let w = Workdir::new("forms-wild");
    let tame = simulate(&w, "tame", &["--seed", "3", "--quiet"]);
    let wild = simulate(&w, "wild", &["--seed", "3", "--flow-delay", "0", "--quiet"]);
    replace(
        &wild,
        "speed = { name = \"speed_mph\", unit = \"mph\" }\n",
        "",
        1,
    );
    for f in ["field-A.csv", "field-B.csv"] {
        drop_column(&w.path("wild/monitor").join(f), "speed_mph");
    }
    let o = plotsieve(&w.0, &["check", wild.to_str().unwrap()]);
    ok(&o);
    assert!(
        String::from_utf8_lossy(&o.stdout).contains("speed not logged: from positions and times")
    );
    for (t, out) in [(&tame, "r-tame"), (&wild, "r-wild")] {
        run_trial(&w, &t, out, &[]);
    }
    let truth = json(&w.path("wild/truth.json"));
    let (rt, nt) = plot_rmse(&w.path("r-tame/3-plots/plots.csv"), &truth);
    let (rw, nw) = plot_rmse(&w.path("r-wild/3-plots/plots.csv"), &truth);
    eprintln!("plot RMSE to truth: with speed {rt:.4} t/ha ({nt} plots), derived {rw:.4} ({nw})");
    assert!(nw >= nt - 2, "{nw} plots kept against {nt}");
    assert!(rw < 1.25 * rt + 0.01, "{rw} against {rt}");
    assert_eq!(
        uplifts_within_truth(&w.path("r-wild"), &truth, 3.0, true),
        5
    );
    let md = read(&w.path("r-wild/5-report/report.md"));
    assert!(
        md.contains("The flow delay estimate is about zero")
            || md.contains("The flow delay estimate is negative"),
        "{md}"
    );
}

#[test]
fn a_research_plot_trial_of_10_m_plots_goes_through_the_defaults() {
    // Research plots 10 m long and two swaths (18 m) wide, cut at 1.0-1.3 m/s with 3 m
    // alleys. Before: the plots stage trimmed the 15 m end trims across travel (along the
    // plots' longer side), kept no point and set every plot aside (min_points), so adjust
    // had no field. Now the ends are those the machine entered and left (the points'
    // headings), each trimmed by at most 0.3 of the length, and a plot needs at most 0.4 of
    // the records a complete harvest of its net plot gives (here 3, one clean pass).
    let w = Workdir::new("forms-research");
    let t = simulate(
        &w,
        "sim",
        &[
            "--seed",
            "5",
            "--plot-length",
            "10",
            "--blocks",
            "6",
            "--quiet",
        ],
    );
    run_trial(&w, &t, "r", &[]);
    let plots = csv_rows(&w.path("r/3-plots/plots.csv"));
    let kept = plots.iter().filter(|r| r["status"] == "kept").count();
    assert_eq!(plots.len(), 72);
    assert!(kept >= 65, "{kept} of 72 plots kept");
    // A plot set aside for too few records names the scaled minimum.
    for r in csv_rows(&w.path("r/3-plots/rejected.csv")) {
        if r["rule"] == "min_points" && r["value"] != "0" {
            assert!(
                r["limit"].starts_with(">= 3 (plots.min_points = 10"),
                "{r:?}"
            );
        }
    }
    let truth = json(&w.path("sim/truth.json"));
    let (rmse, n) = plot_rmse(&w.path("r/3-plots/plots.csv"), &truth);
    eprintln!("research plots: {n} kept, plot RMSE to truth {rmse:.3} t/ha");
    assert!(rmse < 0.35, "{rmse}");
    assert_eq!(uplifts_within_truth(&w.path("r"), &truth, 3.0, false), 15);
}
