//! A catalogue of broken inputs: each must stop run with exit code 1 and a message that
//! names the file, row, column or key at fault, and leave no result that looks valid
//! (no treatments.csv, no report). Every one is also caught by check, which writes nothing.

use crate::common::*;

fn first_lines(p: &Path, n: usize) {
    let t: Vec<String> = read(p).lines().take(n).map(String::from).collect();
    std::fs::write(p, t.join("\n") + "\n").unwrap();
}

/// Edit the plot GeoJSON as JSON.
fn edit_plots(d: &Path, f: impl Fn(&mut serde_json::Value)) {
    let p = d.join("plots.geojson");
    let mut g = json(&p);
    f(&mut g);
    std::fs::write(&p, serde_json::to_string(&g).unwrap()).unwrap();
}

type Edit = Box<dyn Fn(&Path)>;

/// (name, edit of a copy of the trial folder, does check catch it, what the error names).
fn cases() -> Vec<(&'static str, Edit, bool, Vec<&'static str>)> {
    let mon = |d: &Path| d.join("monitor/field-A.csv");
    vec![
        ("trial file not TOML", Box::new(|d: &Path| replace(&d.join("trial.toml"), "[trial]", "[trial", 1)), true, vec!["trial.toml: not valid TOML", "line 4"]),
        ("unknown setting", Box::new(|d: &Path| replace(&d.join("trial.toml"), "[clean]", "[clean]\nspeed_minimum = 1", 1)), true, vec!["unknown key clean.speed_minimum"]),
        ("setting of the wrong type", Box::new(|d: &Path| replace(&d.join("trial.toml"), "flow_delay_s = 11.0", "flow_delay_s = \"eleven\"", 1)), true, vec!["clean.flow_delay_s expects a number"]),
        ("setting out of range", Box::new(|d: &Path| replace(&d.join("trial.toml"), "[clean]", "[clean]\nheader_width_m = -3", 1)), true, vec!["clean.header_width_m must be a finite number >= 0 (got -3)"]),
        ("two settings that contradict", Box::new(|d: &Path| replace(&d.join("trial.toml"), "[clean]", "[clean]\nspeed = { min_m_s = 3.0, max_m_s = 2.0 }", 1)), true, vec!["clean.speed.min_m_s must be below clean.speed.max_m_s"]),
        ("unknown choice", Box::new(|d: &Path| replace(&d.join("trial.toml"), "[clean]", "[clean]\ndelay = { mode = \"guess\" }", 1)), true, vec!["clean.delay.mode must be \"auto\" or \"fixed\" (got \"guess\")"]),
        ("unknown crop", Box::new(|d: &Path| replace(&d.join("trial.toml"), "crop = \"corn\"", "crop = \"maize\"", 1)), true, vec!["trial.crop = \"maize\" is not in config/crops.toml"]),
        ("unknown unit", Box::new(|d: &Path| replace(&d.join("trial.toml"), "unit = \"mph\"", "unit = \"knots\"", 1)), true, vec!["columns.speed.unit", "knots"]),
        ("unknown output unit", Box::new(|d: &Path| replace(&d.join("trial.toml"), "output_unit = \"t_ha\"", "output_unit = \"kg_plot\"", 1)), true, vec!["trial.output_unit"]),
        ("delimiter of two characters", Box::new(|d: &Path| replace(&d.join("trial.toml"), "delimiter = \",\"", "delimiter = \";;\"", 1)), true, vec!["columns.delimiter must be one character"]),
        ("unknown rule switched off", Box::new(|d: &Path| replace(&d.join("trial.toml"), "[clean]", "[clean]\ndisabled_rules = [\"speed_mni\"]", 1)), true, vec!["clean.disabled_rules: unknown rule \"speed_mni\""]),
        ("plots and a layout both", Box::new(|d: &Path| replace(&d.join("trial.toml"), "[clean]", "[[layout]]\nfield = \"A\"\norigin_lon = -97.8\norigin_lat = 40.6\nbearing_deg = 0.0\nplot_width_m = 9.0\nplot_length_m = 60.0\nalley_m = 3.0\ncolumns = 4\nranges = 2\nnumbering = \"row_major\"\nid_prefix = \"A-\"\n\n[clean]", 1)), true, vec!["give inputs.plots or [[layout]], not both"]),
        ("check treatment not in the design", Box::new(|d: &Path| replace(&d.join("trial.toml"), "check = \"check\"", "check = \"control\"", 1)), true, vec!["design.csv: field A has no plot of the check treatment \"control\" (trial.check)"]),
        ("monitor folder missing", Box::new(|d: &Path| replace(&d.join("trial.toml"), "monitor = [\"monitor\"]", "monitor = [\"nowhere\"]", 1)), true, vec!["nowhere: cannot read: no such file or folder (inputs.monitor)"]),
        ("design file missing", Box::new(|d: &Path| std::fs::remove_file(d.join("design.csv")).unwrap()), true, vec!["design.csv"]),
        ("plot file missing", Box::new(|d: &Path| std::fs::remove_file(d.join("plots.geojson")).unwrap()), true, vec!["plots.geojson"]),
        ("mapped column absent", Box::new(|d: &Path| replace(&d.join("trial.toml"), "moisture = \"moisture_pct\"", "moisture = \"grain_moisture\"", 1)), true, vec!["monitor/field-A.csv: column \"grain_moisture\" named in [columns] moisture is not in the header"]),
        ("wrong time format", Box::new(|d: &Path| replace(&d.join("trial.toml"), "format = \"iso8601\"", "format = \"unix_s\"", 1)), true, vec!["export monitor/field-A.csv: none of its", "unparseable"]),
        ("empty export", Box::new(move |d: &Path| std::fs::write(mon(d), "").unwrap()), true, vec!["monitor/field-A.csv"]),
        ("header-only export", Box::new(move |d: &Path| first_lines(&mon(d), 1)), true, vec!["monitor/field-A.csv: no data rows after the header"]),
        ("binary export", Box::new(move |d: &Path| std::fs::write(mon(d), (0..=255u8).cycle().take(2560).collect::<Vec<u8>>()).unwrap()), true, vec!["monitor/field-A.csv: column \"time_utc\""]),
        ("decimal commas", Box::new(move |d: &Path| set_col(&mon(d), "moisture_pct", |v| v.replace('.', ","))), true, vec!["export monitor/field-A.csv: none of its", "wrong_field_count"]),
        ("lon and lat swapped", Box::new(move |d: &Path| replace(&mon(d), "time_utc,lon_deg,lat_deg", "time_utc,lat_deg,lon_deg", 1)), true, vec!["export monitor/field-A.csv: none of its", "coordinate_range"]),
        ("all positions at 0,0", Box::new(move |d: &Path| { set_col(&mon(d), "lon_deg", |_| "0".into()); set_col(&mon(d), "lat_deg", |_| "0".into()) }), true, vec!["export monitor/field-A.csv: none of its", "no_position"]),
        ("projected coordinates read as degrees", Box::new(move |d: &Path| { set_col(&mon(d), "lon_deg", |_| "402200.06".into()); set_col(&mon(d), "lat_deg", |_| "4040600.17".into()) }), true, vec!["export monitor/field-A.csv: none of its", "coordinate_range"]),
        ("latitude sign flipped", Box::new(move |d: &Path| set_col(&mon(d), "lat_deg", |v| format!("-{v}"))), true, vec!["monitor/field-A.csv: none of its", "far_from_trial", "field A"]),
        ("an export from elsewhere", Box::new(move |d: &Path| set_col(&mon(d), "lon_deg", |v| format!("{:.8}", v.parse::<f64>().unwrap() + 1.0))), true, vec!["monitor/field-A.csv: none of its", "field A"]),
        ("flow all NaN", Box::new(move |d: &Path| set_col(&mon(d), "mass_flow_lb_s", |_| "NaN".into())), true, vec!["export monitor/field-A.csv: none of its", "unparseable"]),
        ("flow all negative", Box::new(move |d: &Path| set_col(&mon(d), "mass_flow_lb_s", |_| "-1".into())), true, vec!["export monitor/field-A.csv: none of its", "negative_value"]),
        ("time not ISO 8601", Box::new(move |d: &Path| set_col(&mon(d), "time_utc", |v| v.replace('T', " at "))), true, vec!["export monitor/field-A.csv: none of its", "unparseable"]),
        ("speed all zero", Box::new(move |d: &Path| set_col(&mon(d), "speed_mph", |_| "0".into())), true, vec!["export monitor/field-A.csv: all", "speed_min", "field A: no kept plot"]),
        ("swath all zero", Box::new(move |d: &Path| set_col(&mon(d), "swath_ft", |_| "0".into())), true, vec!["export monitor/field-A.csv: all", "field A: no kept plot"]),
        ("moisture all 200 %", Box::new(move |d: &Path| set_col(&mon(d), "moisture_pct", |_| "200".into())), true, vec!["export monitor/field-A.csv: all", "moisture_max", "field A"]),
        ("a one-record export", Box::new(move |d: &Path| first_lines(&mon(d), 2)), true, vec!["monitor/field-A.csv", "field A"]),
        ("design column renamed", Box::new(|d: &Path| replace(&d.join("design.csv"), "plot_id,treatment,block,field", "plot_id,treatment,block,paddock", 1)), true, vec!["design.csv: column \"field\"", "not in the header"]),
        ("design cell empty", Box::new(|d: &Path| { let t = read(&d.join("design.csv")); let second = t.lines().nth(1).unwrap().to_string(); let mut v: Vec<&str> = second.split(',').collect(); v[1] = ""; replace(&d.join("design.csv"), &second, &v.join(","), 1) }), true, vec!["design.csv, line 2, column \"treatment\": empty"]),
        ("design id twice", Box::new(|d: &Path| { let t = read(&d.join("design.csv")); let second = t.lines().nth(1).unwrap().to_string(); std::fs::write(d.join("design.csv"), format!("{t}{second}\n")).unwrap() }), true, vec!["design.csv, line", "duplicate plot id"]),
        ("design id without a polygon", Box::new(|d: &Path| { let t = read(&d.join("design.csv")); std::fs::write(d.join("design.csv"), format!("{t}A-999,check,1,A\n")).unwrap() }), true, vec!["plot ids with no polygon in plots.geojson: A-999"]),
        ("design without rows", Box::new(|d: &Path| first_lines(&d.join("design.csv"), 1)), true, vec!["design.csv: design table has no rows"]),
        ("a field without the check", Box::new(|d: &Path| { let t = read(&d.join("design.csv")); let t: Vec<String> = t.lines().map(|l| if l.ends_with(",B") { l.replace(",check,", ",prod-z,") } else { l.to_string() }).collect(); std::fs::write(d.join("design.csv"), t.join("\n") + "\n").unwrap() }), true, vec!["field B has no plot of the check treatment"]),
        ("plot file not JSON", Box::new(|d: &Path| std::fs::write(d.join("plots.geojson"), "{\"features\": [}").unwrap()), true, vec!["plots.geojson: not valid JSON"]),
        ("plot file without features", Box::new(|d: &Path| std::fs::write(d.join("plots.geojson"), "{\"type\":\"FeatureCollection\"}").unwrap()), true, vec!["plots.geojson: expected a GeoJSON FeatureCollection"]),
        ("a plot that is a point", Box::new(|d: &Path| edit_plots(d, |g| g["features"][0]["geometry"] = serde_json::json!({"type": "Point", "coordinates": [-97.8, 40.6]}))), true, vec!["plots.geojson: feature 0", "expected Polygon"]),
        ("a plot without its id", Box::new(|d: &Path| edit_plots(d, |g| { g["features"][2]["properties"] = serde_json::json!({}); })), true, vec!["plots.geojson: feature 2: no property \"plot_id\" (inputs.plot_id_property)"]),
        ("a ring of three positions", Box::new(|d: &Path| edit_plots(d, |g| { let r = g["features"][1]["geometry"]["coordinates"][0].as_array_mut().unwrap(); r.truncate(3); })), true, vec!["plots.geojson: feature 1", "at least 4 positions"]),
        ("a bow-tie plot", Box::new(|d: &Path| edit_plots(d, |g| { let r = g["features"][4]["geometry"]["coordinates"][0].as_array_mut().unwrap(); r.swap(1, 2); })), true, vec!["plots.geojson: plot", "boundary crosses itself"]),
        ("a mistyped vertex", Box::new(|d: &Path| edit_plots(d, |g| g["features"][5]["geometry"]["coordinates"][0][2][0] = serde_json::json!(-1.0))), true, vec!["plots.geojson: plot", "likely mistyped"]),
        ("a sliver plot", Box::new(|d: &Path| edit_plots(d, |g| { let r = &mut g["features"][6]["geometry"]["coordinates"][0]; let p0 = r[0].clone(); let p1 = r[1].clone(); *r = serde_json::json!([p0.clone(), p1.clone(), p0.clone(), p1, p0]); })), true, vec!["plots.geojson: plot", "area 0.000 m^2"]),
    ]
}

#[test]
fn broken_inputs_stop_the_run_and_name_what_is_wrong() {
    let w = Workdir::new("catalogue");
    simulate(&w, "base", &["--seed", "21"]);
    let cases = cases();
    assert!(cases.len() >= 40, "{} cases", cases.len());
    let mut failures = Vec::new();
    for (k, (name, edit, check_catches, says)) in cases.iter().enumerate() {
        let d = w.path(&format!("case{k}"));
        copy_dir(&w.path("base"), &d);
        edit(&d);
        let t = d.join("trial.toml");
        let t = t.to_str().unwrap();
        let run = plotsieve(&w.0, &["run", t, "--out", &format!("run{k}"), "--quiet"]);
        let err = String::from_utf8_lossy(&run.stderr).to_string();
        let left: Vec<&str> = [
            "4-adjust/treatments.csv",
            "5-report/report.html",
            "5-report/report.md",
        ]
        .into_iter()
        .filter(|f| w.path(&format!("run{k}/{f}")).exists())
        .collect();
        let missing: Vec<&&str> = says.iter().filter(|s| !err.contains(**s)).collect();
        if run.status.code() != Some(1) || !missing.is_empty() || !left.is_empty() {
            failures.push(format!(
                "{name}: exit {:?}, missing {missing:?}, left {left:?}\n{err}",
                run.status.code()
            ));
        }
        if *check_catches {
            let c = plotsieve(&w.0, &["check", t]);
            if c.status.code() != Some(1) {
                failures.push(format!("{name}: check passed what run refuses"));
            }
        }
    }
    assert!(
        failures.is_empty(),
        "{} of {} cases:\n{}",
        failures.len(),
        cases.len(),
        failures.join("\n\n")
    );
}
