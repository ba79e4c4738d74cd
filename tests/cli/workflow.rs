//! What a workflow engine calls: `plotsieve inputs` (every file a run reads, for the job's
//! inputs), `plotsieve season --withdraw` (after a failed job), and a season file's
//! `allow_failed_trials`. The engine itself runs in CI (`workflow/tests/check_workflow.py`).

use crate::common::*;

const SEASON: &str = "[season]\nname = \"Three trials\"\n\n[[trial]]\nfile = \"a/trial.toml\"\nout = \"runs/a\"\n\n[[trial]]\nfile = \"b/trial.toml\"\nout = \"runs/b\"\n\n[[trial]]\nfile = \"c/trial.toml\"\nout = \"runs/c\"\n";

#[test]
fn inputs_lists_the_files_the_manifest_hashes() {
    let w = Workdir::new("wf-inputs");
    simulate(&w, "a", &["--seed", "31", "--quiet"]);
    let o = plotsieve(&w.0, &["inputs", "a/trial.toml"]);
    ok(&o);
    let listed: Vec<String> = String::from_utf8_lossy(&o.stdout)
        .lines()
        .map(String::from)
        .collect();
    assert_eq!(listed[0], "a/trial.toml");
    for p in &listed {
        assert!(w.path(p).is_file(), "{p}");
    }
    run_trial(&w, &w.path("a/trial.toml"), "runs/a", &[]);
    let manifest = json(&w.path("runs/a/manifest.json"));
    let hashed: Vec<String> = manifest["inputs"]
        .as_array()
        .unwrap()
        .iter()
        .map(|i| format!("a/{}", i["path"].as_str().unwrap()))
        .collect();
    assert_eq!(listed, hashed);
    assert_eq!(
        listed,
        [
            "a/trial.toml",
            "a/monitor/field-A.csv",
            "a/monitor/field-B.csv",
            "a/plots.geojson",
            "a/design.csv"
        ]
    );
    // A trial file that cannot be read: an error naming it.
    let o = plotsieve(&w.0, &["inputs", "missing/trial.toml"]);
    assert!(!o.status.success());
    assert!(
        printed(&o).contains("missing/trial.toml"),
        "{}",
        printed(&o)
    );
}

#[test]
fn a_failed_trial_stops_the_season_unless_the_season_file_allows_it() {
    let w = Workdir::new("wf-failed");
    for (d, seed) in [("a", "32"), ("b", "33"), ("c", "34")] {
        simulate(&w, d, &["--seed", seed, "--quiet"]);
    }
    // Trial c's design names a plot without a treatment: its run fails at ingest.
    map_lines(&w.path("c/design.csv"), |i, l| {
        if i == 1 {
            let mut cells: Vec<&str> = l.split(',').collect();
            cells[1] = "";
            cells.join(",")
        } else {
            l.to_string()
        }
    });
    for d in ["a", "b"] {
        run_trial(
            &w,
            &w.path(&format!("{d}/trial.toml")),
            &format!("runs/{d}"),
            &[],
        );
    }
    let o = plotsieve(&w.0, &["run", "c/trial.toml", "--out", "runs/c", "--quiet"]);
    assert!(!o.status.success());
    std::fs::write(w.path("season.toml"), SEASON).unwrap();
    let o = plotsieve(&w.0, &["season", "season.toml", "--quiet"]);
    assert!(!o.status.success());
    assert!(
        printed(&o).contains("trial c/trial.toml: its adjust stage"),
        "{}",
        printed(&o)
    );
    assert!(!w.path("season-run").exists());
    // Allowed: fitted from a and b, with the trial and its stage at the top of the reports.
    std::fs::write(
        w.path("season.toml"),
        SEASON.replace("[season]\n", "[season]\nallow_failed_trials = true\n"),
    )
    .unwrap();
    let o = plotsieve(&w.0, &["season", "season.toml", "--quiet"]);
    ok(&o);
    let said = printed(&o);
    assert!(
        said.contains("trial c/trial.toml left out of the season (allow_failed_trials = true): its run failed at stage ingest"),
        "{said}"
    );
    let summary = json(&w.path("season-run/summary.json"));
    let trials = summary["trials"].as_array().unwrap();
    assert_eq!(trials.len(), 2, "{trials:?}");
    assert!(summary["warnings"]
        .as_array()
        .unwrap()
        .iter()
        .any(|v| v.as_str().unwrap().contains("trial c/trial.toml left out")));
    let md = read(&w.path("season-run/report.md"));
    let top = &md[..md.find("## Decision").unwrap_or(md.len())];
    assert!(top.contains("trial c/trial.toml left out"), "{top}");
    // The same season without the failed trial listed gives the same tables.
    std::fs::write(
        w.path("two.toml"),
        SEASON
            .replace(
                "\n[[trial]]\nfile = \"c/trial.toml\"\nout = \"runs/c\"\n",
                "",
            )
            .replace("[season]\n", "[season]\nout = \"two-run\"\n"),
    )
    .unwrap();
    ok(&plotsieve(&w.0, &["season", "two.toml", "--quiet"]));
    for f in std::fs::read_dir(w.path("two-run")).unwrap() {
        let name = f.unwrap().file_name().to_string_lossy().to_string();
        if name.ends_with(".csv") {
            assert_eq!(
                sha(&w.path("two-run").join(&name)),
                sha(&w.path("season-run").join(&name)),
                "{name}"
            );
        }
    }
    // Every trial failed: nothing to fit, an error listing them.
    std::fs::write(
        w.path("none.toml"),
        "[season]\nallow_failed_trials = true\nout = \"none-run\"\n\n[[trial]]\nfile = \"c/trial.toml\"\nout = \"runs/c\"\n",
    )
    .unwrap();
    let o = plotsieve(&w.0, &["season", "none.toml", "--quiet"]);
    assert!(!o.status.success());
    assert!(printed(&o).contains("no trial of the season finished its run"));
}

#[test]
fn withdraw_removes_a_season_folder_and_nothing_else() {
    let w = Workdir::new("wf-withdraw");
    for (d, seed) in [("a", "35"), ("b", "36")] {
        simulate(&w, d, &["--seed", seed, "--quiet"]);
        run_trial(
            &w,
            &w.path(&format!("{d}/trial.toml")),
            &format!("runs/{d}"),
            &[],
        );
    }
    let two = SEASON.replace(
        "\n[[trial]]\nfile = \"c/trial.toml\"\nout = \"runs/c\"\n",
        "",
    );
    std::fs::write(w.path("season.toml"), &two).unwrap();
    ok(&plotsieve(&w.0, &["season", "season.toml", "--quiet"]));
    assert!(w.path("season-run/summary.json").is_file());
    let o = plotsieve(&w.0, &["season", "season.toml", "--withdraw"]);
    ok(&o);
    assert!(printed(&o).contains("withdrew the season folder"));
    assert!(!w.path("season-run").exists());
    assert!(w.path("runs/a/4-adjust/contrasts.json").is_file());
    // Nothing to withdraw: said, not an error.
    let o = plotsieve(&w.0, &["season", "season.toml", "--withdraw"]);
    ok(&o);
    assert!(printed(&o).contains("no season folder"));
    // A folder of something else under that name is left alone.
    std::fs::create_dir_all(w.path("season-run")).unwrap();
    std::fs::write(w.path("season-run/notes.txt"), "mine").unwrap();
    let o = plotsieve(&w.0, &["season", "season.toml", "--withdraw"]);
    assert!(!o.status.success());
    assert!(printed(&o).contains("is not a season folder"));
    assert_eq!(read(&w.path("season-run/notes.txt")), "mine");
}
