//! The `trial.toml` a simulated trial comes with: the trial, its inputs and the `[columns]`
//! mapping of the export form written.

use super::{SimForm, SimOptions};

const TEXT_COLUMNS: &str = r#"delimiter = ","
time = { name = "time_utc", format = "iso8601" }
longitude = "lon_deg"
latitude = "lat_deg"
flow = { name = "mass_flow_lb_s", unit = "lb_s" }
speed = { name = "speed_mph", unit = "mph" }
width = { name = "swath_ft", unit = "ft" }
moisture = "moisture_pct"
work_state = "header_state"
hdop = "hdop"
"#;

const DISTANCE_COLUMNS: &str = r#"delimiter = ";"
decimal = ","
time = { name = "Time", format = "time_of_day", date = "Date", date_order = "dmy" }
longitude = "Longitude"
latitude = "Latitude"
flow = { name = "Flow_lb_s", unit = "lb_s" }
distance = { name = "Distance_in", unit = "in" }
interval = "Interval_s"
width = { name = "Swath_ft", unit = "ft" }
moisture = "Moisture_pct"
work_state = "Header"
hdop = "HDOP"
"#;

const SHAPE_COLUMNS: &str = r#"delimiter = ","
time = { name = "time_utc", format = "iso8601" }
longitude = "lon_deg"
latitude = "lat_deg"
flow = { name = "flow_lb_s", unit = "lb_s" }
speed = { name = "speed_mph", unit = "mph" }
width = { name = "swath_ft", unit = "ft" }
moisture = "moist_pct"
work_state = "header"
hdop = "hdop"
"#;

const YIELD_COLUMNS: &str = r#"delimiter = ","
time = { name = "time_utc", format = "iso8601" }
longitude = "lon_deg"
latitude = "lat_deg"
yield = { name = "dry_yield_t_ha", unit = "t_ha", basis = "dry" }
moisture = "moisture_pct"
work_state = "header_state"
"#;

pub(super) fn trial_toml(o: &SimOptions) -> String {
    let seed = o.seed;
    // The options that shape the exports, for the header comment.
    let mut how = String::new();
    if o.form != SimForm::Text {
        how += &format!(" --form {}", o.form);
    }
    if o.interval_s > 1 {
        how += &format!(" --interval-s {}", o.interval_s);
    }
    if o.strips {
        how += " --strips";
    }
    if o.labels {
        how += " --labels";
    }
    if o.prescription {
        how += " --prescription";
    }
    if o.rates {
        how += " --rates";
    }
    if o.applied {
        how += " --applied";
    }
    // Plots as polygons with a design table, or built from the records' labels.
    let plots = if o.prescription {
        "prescription = \"prescription.geojson\"\nprescription_property = \"product\"\n"
    } else if o.labels {
        ""
    } else {
        "plots = \"plots.geojson\"\nplot_id_property = \"plot_id\"\ndesign = \"design.csv\"\n"
    };
    let label = match (o.labels, o.form) {
        (false, _) => "",
        (true, SimForm::DistanceText) => "treatment = \"Treatment\"\n",
        (true, _) => "treatment = \"treatment\"\n",
    };
    let applied = match (o.applied, o.form) {
        (false, _) => "",
        (true, SimForm::DistanceText) => {
            "applied_rate = { name = \"Applied_N_kg_ha\", unit = \"kg_ha\" }\n"
        }
        (true, SimForm::Shapefile) => "applied_rate = { name = \"applied_n\", unit = \"kg_ha\" }\n",
        (true, _) => "applied_rate = { name = \"applied_n_kg_ha\", unit = \"kg_ha\" }\n",
    };
    let label = format!("{label}{applied}");
    let columns = match o.form {
        SimForm::Text | SimForm::GeoPackage => TEXT_COLUMNS,
        // Task data names its quantities by DDI: no [columns] section.
        SimForm::TaskData => "",
        // dBase names: at most 10 characters.
        SimForm::Shapefile => SHAPE_COLUMNS,
        SimForm::DistanceText => DISTANCE_COLUMNS,
        SimForm::YieldPoints => YIELD_COLUMNS,
    };
    let columns = if columns.is_empty() {
        String::new()
    } else {
        format!("\n# How this combine's monitor names and scales its columns.\n[columns]\n{columns}{label}")
    };
    let (kind, check, adjust) = if o.rates {
        let t = super::RATE_TRUTH;
        let rates: Vec<String> = super::RATE_TREATMENTS
            .iter()
            .zip(super::RATES_KG_HA)
            .map(|((n, _), r)| format!("\"{n}\" = {r}"))
            .collect();
        (
            "nitrogen-rate",
            "N0",
            format!(
                "\n[adjust]\n# A nitrogen-rate trial: each treatment's N rate, and the prices.\nrates = {{ {} }}\nrate_unit = \"kg_ha\"\ngrain_price = {}\ngrain_price_unit = \"t\"\ninput_price = {}\ninput_price_unit = \"kg\"\n",
                rates.join(", "),
                t.grain_price_per_t,
                t.n_price_per_kg
            ),
        )
    } else {
        ("product", "check", String::new())
    };
    format!(
        r#"# An invented trial made by `plotsieve simulate --seed {seed}{how}` (Brackenmoor trial station,
# a made-up place). Paths are relative to this file.

[trial]
name = "Brackenmoor {kind} trial, seed {seed}"
crop = "corn"
output_unit = "t_ha"
check = "{check}"

[inputs]
monitor = ["monitor"]
{plots}{columns}
[clean]
# Flow and moisture delays are estimated per export (clean.delay.mode = "auto"); these are
# the fallbacks when an export has too few opposite passes.
flow_delay_s = 11.0
moisture_delay_s = 8.0
{adjust}"#
    )
}
