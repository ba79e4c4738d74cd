//! Unit tests of plot-table reading.

use super::*;
use crate::crop::crop_table;

/// A wheat plot table from `text`, read with 1.5 m rows and 6 m ranges.
fn table(text: &str) -> Result<PlotTable, IngestError> {
    table_of(text, &crop_table()["wheat"])
}

/// [`table`] for any crop values.
fn table_of(text: &str, crop: &Crop) -> Result<PlotTable, IngestError> {
    let dir = std::env::temp_dir().join(format!("plotsieve-pt-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let p = dir.join(format!("t{}-{}.csv", text.len(), crop.plot_yield_max_kg_ha));
    std::fs::write(&p, text).unwrap();
    let names = Names {
        row_spacing: 1.5,
        range_spacing: 6.0,
        id_property: "plot_id",
        yield_property: "",
        yield_unit: "",
    };
    let r = read(&p, "t.csv", crop, &names);
    std::fs::remove_file(&p).unwrap();
    r
}

#[test]
fn a_variety_trial_table_with_rows_and_ranges() {
    let t = table(
        "plot,variety,rep,yield_t_ha,row,range\n\
         1,Alpha,1,6.5,1,1\n\
         2,Beta,1,7.25,2,1\n\
         3,Alpha,2,x,1,2\n\
         4,Beta,2,95,2,2\n\
         5,,2,6.0,3,2\n",
    )
    .unwrap();
    assert_eq!(t.rows, 5);
    // Plot 4's 95 t/ha lies outside wheat's bounds for single records (300-15,000
    // kg/ha): kept, and listed for the warning.
    assert_eq!(t.plots.len(), 3);
    assert_eq!(t.outside_record_bounds, vec![("4".to_string(), 95_000.0)]);
    let flags: Vec<(&str, &str, &str)> = t
        .plots
        .iter()
        .map(|p| (p.plot_id.as_str(), p.status.as_str(), p.reason.as_str()))
        .collect();
    assert_eq!(
        flags,
        vec![
            ("1", "kept", ""),
            ("2", "kept", ""),
            ("4", "kept", "outside_record_bounds")
        ]
    );
    let w = t.bounds_warning("t.csv", &crop_table()["wheat"]).unwrap();
    assert!(
        w.contains("1 plot(s) yield outside 300-15000 kg/ha") && w.contains("4 (95000 kg/ha)"),
        "{w}"
    );
    assert_eq!(t.plots[1].yield_mean, 7250.0);
    assert_eq!(
        (t.plots[1].centroid_x_m, t.plots[1].centroid_y_m),
        (3.0, 6.0)
    );
    assert_eq!(t.plots[0].field, "1");
    let rules: Vec<(&str, u64, &str)> = t
        .rejections
        .iter()
        .map(|r| (&*r.rule, r.source_row, &*r.column))
        .collect();
    assert_eq!(
        rules,
        vec![
            ("unparseable", 4, "yield_t_ha"),
            ("missing_value", 6, "variety")
        ]
    );
    assert!(t.read_as.contains("treatment variety, block rep"));
}

#[test]
fn plot_bounds_set_by_the_trial_set_plots_aside_and_negative_yields_never_pass() {
    let text = "plot,variety,rep,yield_t_ha,row,range\n\
                1,Alpha,1,0.2,1,1\n\
                2,Beta,1,7.25,2,1\n\
                3,Alpha,2,-1,1,2\n";
    let mut wheat = crop_table()["wheat"].clone();
    // Without plot bounds the 0.2 t/ha plot is kept and flagged.
    let t = table_of(text, &wheat).unwrap();
    assert_eq!(t.plots.len(), 2);
    assert_eq!(t.outside_record_bounds, vec![("1".to_string(), 200.0)]);
    wheat.plot_yield_min_kg_ha = 500.0;
    wheat.plot_yield_max_kg_ha = 12_000.0;
    let t = table_of(text, &wheat).unwrap();
    assert_eq!(t.plots.len(), 1);
    assert!(t.outside_record_bounds.is_empty());
    let rules: Vec<(&str, u64)> = t
        .rejections
        .iter()
        .map(|r| (&*r.rule, r.source_row))
        .collect();
    assert_eq!(rules, vec![("plot_yield_bounds", 2), ("negative_value", 4)]);
}

#[test]
fn units_ids_and_columns_are_checked() {
    // bu/ac of wheat (60 lb/bu): 100 bu/ac = 6,725.1 kg/ha.
    let t = table("plot_id,treatment,block,yield_bu_ac,x_m,y_m\nA,c,1,100,0,0\n").unwrap();
    assert!(
        (t.plots[0].yield_mean - 6725.106).abs() < 0.01,
        "{}",
        t.plots[0].yield_mean
    );
    let e = |text: &str| table(text).err().unwrap().to_string();
    assert!(e("plot_id,treatment,block,yield,x_m,y_m\nA,c,1,7,0,0\n")
        .contains("no yield column: name it with its unit"));
    assert!(
        e("plot_id,treatment,block,yield_t_ha,x_m,y_m\nA,c,1,7,0,0\nA,d,1,7,1,0\n")
            .contains("plot id \"A\" on lines 2 and 3")
    );
    assert!(e("plot_id,treatment,yield_t_ha,x_m,y_m\nA,c,7,0,0\n").contains("no block column"));
    assert!(
        e("plot_id,treatment,block,yield_t_ha\nA,c,1,7\n").contains("needs columns x_m and y_m")
    );
    assert!(e("plot_id,treatment,block,yield_t_ha,x_m,y_m\n").contains("header only"));
}
