//! `plotsieve check`'s reading of a trial's inputs: every export read in full as `run` would,
//! the plots checked and matched to the design, every problem and what was read listed
//! (lines starting `read: ` are what was read, the rest problems).

use super::*;

/// Everything `plotsieve check` can find without writing: returns every problem.
pub fn check(cfg: &IngestConfig, base: &Path) -> Vec<String> {
    let mut problems = Vec::new();
    if let Err(e) = &cfg.crop {
        problems.push(e.to_string());
    }
    // Every export is read in full, as run would: (name, rows, WGS84 positions read).
    let mut exports: Vec<(String, u64, Vec<(f64, f64)>)> = Vec::new();
    match monitor_files(cfg, base) {
        Err(e) => problems.push(e.to_string()),
        Ok(files) => {
            let names: Vec<String> = files.iter().map(|p| display(base, p)).collect();
            if let Err(e) = formats::columns_needed(cfg, &files, &names) {
                return vec![e.to_string()];
            }
            let machine = memory::machine_bytes();
            match memory::check(&files, &names, cfg.ingest.max_memory_share, machine) {
                // Nothing is read when the exports would not fit.
                Err(e) => return vec![e.to_string()],
                Ok(need) => problems.push(match machine {
                    Some(m) => format!(
                        "read: memory: the exports need about {} MiB in a run, of the {} MiB allowed (ingest.max_memory_share = {} of {} MiB)",
                        need >> 20,
                        (cfg.ingest.max_memory_share * m as f64) as u64 >> 20,
                        cfg.ingest.max_memory_share,
                        m >> 20
                    ),
                    None => format!(
                        "read: memory: the exports need about {} MiB in a run; this machine's memory cannot be read, so it is not checked",
                        need >> 20
                    ),
                }),
            }
            for (i, p) in files.iter().enumerate() {
                let name = display(base, p);
                let format = formats::for_file(p);
                problems.push(format!(
                    "read: {name}: {}: {}",
                    format.name(),
                    format.describe_file(cfg, p)
                ));
                if let Err(e) = format.check(cfg, p, &name) {
                    problems.push(e);
                    continue;
                }
                match format.read(cfg, p, &name, i as u32) {
                    Err(e) => problems.push(e.to_string()),
                    Ok(read) => {
                        if read.points.is_empty() {
                            problems.extend(unread_exports(
                                std::slice::from_ref(&name),
                                &[],
                                &read.rejections,
                            ));
                        }
                        let pos = read.points.iter().map(|r| (r.lon, r.lat)).collect();
                        exports.push((name, read.rows, pos));
                    }
                }
            }
        }
    }
    if cfg.plots_from_labels() {
        // Plots and design come from the labels: build them as run would.
        match run(cfg, base) {
            Err(e) => problems.push(e.to_string()),
            Ok(o) => {
                let fields: std::collections::BTreeSet<&str> =
                    o.design.iter().map(|d| d.field.as_str()).collect();
                // Its warnings come with the front half's (`plotsieve check` runs it next).
                problems.push(format!(
                    "read: plots: {} plots in {} field(s) built from the treatment labels ({})",
                    o.polygons.len(),
                    fields.len(),
                    label_source(cfg)
                ));
            }
        }
        return problems;
    }
    let design = read_design(&base.join(&cfg.inputs.design), &cfg.inputs.design);
    let polys = if cfg.layout.is_empty() {
        cfg.read_plot_input(base)
            .map(|p| (p, cfg.inputs.plots.clone()))
    } else {
        // Ids do not depend on where the grid lies.
        Ok((
            cfg.layout
                .iter()
                .flat_map(|l| l.polygons(0.0, 0.0))
                .collect(),
            "[[layout]]".to_string(),
        ))
    };
    if let Ok((p, name)) = &polys {
        if cfg.layout.is_empty() {
            problems.extend(plot_checks::problems(p, name));
            problems.extend(far_exports(&exports, p, cfg.far_m));
        }
    }
    if let Ok(d) = &design {
        problems.extend(
            single_plot_treatments(d)
                .into_iter()
                .map(|w| format!("warning: {w}")),
        );
    }
    match (polys, design) {
        (Ok((p, name)), Ok(d)) => match reconcile(cfg, &name, p, d) {
            Err(e) => problems.push(e.to_string()),
            Ok((_, _, warnings)) => {
                problems.extend(warnings.into_iter().map(|w| format!("warning: {w}")))
            }
        },
        (p, d) => {
            if let Err(e) = p {
                problems.push(e.to_string());
            }
            if let Err(e) = d {
                problems.push(e.to_string());
            }
        }
    }
    problems
}
