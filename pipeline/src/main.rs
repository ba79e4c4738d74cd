//! `plotsieve`: the command line over the stages library.
//!
//! Exit codes: 0 success; 1 an error (bad configuration, unusable input, a missing upstream
//! stage; the message names the file, row and column or the key); 2 a usage error (unknown
//! command or flag, from clap).

mod check;
mod dry_run;
mod glue;
mod intake;
mod io;
mod lock;
mod run;
mod season;
mod season_rates;
mod simulate_files;
mod stage;
mod trial;

use clap::{Parser, Subcommand};
use plotsieve_stages::simulate;
use stage::Stage;
use std::path::PathBuf;
use std::process::ExitCode;

/// Yield-monitor exports to spatially adjusted trial results.
#[derive(Parser, Debug)]
#[command(name = "plotsieve", version, about, long_about = None)]
struct Cli {
    /// No progress bars.
    #[arg(long, global = true)]
    quiet: bool,
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand, Debug)]
enum Command {
    /// Run every stage on a trial.
    Run {
        /// Trial configuration (TOML); its paths are relative to it.
        trial: PathBuf,
        /// Run folder [default: runs/<folder of the trial file>-<trial file name without .toml>].
        #[arg(long)]
        out: Option<PathBuf>,
        /// Override a setting, e.g. --set clean.speed.min_m_s=0.8 (repeatable).
        #[arg(long = "set", value_name = "KEY=VALUE")]
        set: Vec<String>,
    },
    /// Rerun one stage from the previous stage's saved output; the outputs of later stages
    /// are removed and they become stale.
    Stage {
        /// The stage to rerun.
        name: Stage,
        /// Trial configuration (TOML); its paths are relative to it. Must be the trial the
        /// run folder was made for.
        trial: PathBuf,
        /// Run folder holding the earlier stages' output [default: runs/<folder of the trial
        /// file>-<trial file name without .toml>].
        #[arg(long)]
        out: Option<PathBuf>,
        /// Override a setting for this stage, e.g. --set clean.speed.min_m_s=0.8 (repeatable).
        #[arg(long = "set", value_name = "KEY=VALUE")]
        set: Vec<String>,
    },
    /// Validate the configuration and read every input as run would; print every problem;
    /// write nothing.
    Check {
        /// Trial configuration (TOML); its paths are relative to it.
        trial: PathBuf,
        /// Override a setting, e.g. --set clean.speed.min_m_s=0.8 (repeatable).
        #[arg(long = "set", value_name = "KEY=VALUE")]
        set: Vec<String>,
    },
    /// Print every file a run of the trial reads, one per line, the trial file first (for a
    /// workflow engine's inputs; paths as the trial file's path gives them).
    Inputs {
        /// Trial configuration (TOML).
        trial: PathBuf,
    },
    /// Write a complete invented trial (exports, plots, design, trial.toml, truth.json).
    Simulate {
        /// Folder to write to (created; existing files of the same names are replaced).
        dir: PathBuf,
        /// Seed of the random draws: the same seed and options give the same files, byte
        /// for byte.
        #[arg(long, default_value_t = 1)]
        seed: u64,
        /// Number of fields.
        #[arg(long, default_value_t = 2)]
        fields: usize,
        /// Blocks (replicates) per field.
        #[arg(long, default_value_t = 4)]
        blocks: usize,
        /// Plot length along the direction of travel, metres (research plots: 6-12).
        #[arg(long, default_value_t = 60.0)]
        plot_length: f64,
        /// Multiplies every product's true effect on yield (truth.json lists them; 1 = as
        /// listed, 0 = no product has any effect).
        #[arg(long, default_value_t = 1.0)]
        effect_scale: f64,
        /// SD of the spatial trend in kg/ha.
        #[arg(long, default_value_t = 1200.0)]
        trend_sd: f64,
        /// True flow delay in seconds [default: drawn from 8-14 s].
        #[arg(long)]
        flow_delay: Option<f64>,
        /// Longitude of the first field (WGS84 degrees).
        #[arg(long, default_value_t = -97.80, allow_hyphen_values = true)]
        origin_lon: f64,
        /// Latitude of the first field (WGS84 degrees).
        #[arg(long, default_value_t = 40.60, allow_hyphen_values = true)]
        origin_lat: f64,
        /// An on-farm strip trial: strips one header wide, the check alternating with one
        /// product (instead of a randomised complete block design).
        #[arg(long)]
        strips: bool,
        /// SD of each record's own yield noise before grain mixing, kg/ha.
        #[arg(long, default_value_t = 400.0)]
        point_noise: f64,
        /// Layout of the monitor exports: text (comma-delimited, speed column),
        /// distance_text (semicolons, decimal commas, date and time columns, distance per
        /// record and interval instead of speed), yield_points (yields already computed),
        /// geopackage (the text form's records as a GeoPackage point layer), taskdata
        /// (ISO 11783-10 task data, one task per field) or shapefile (point Shapefiles).
        #[arg(long, default_value = "text")]
        form: String,
        /// Seconds between logged records (1-5).
        #[arg(long, default_value_t = 1)]
        interval_s: usize,
        /// Each record carries the treatment of the plot it was cut in, and no plot
        /// polygons or design are written: plots are built from the labels.
        #[arg(long)]
        labels: bool,
        /// No plot polygons or design but prescription polygons (each plot's rectangle
        /// with its treatment): plots are built from the records' treatments by position.
        #[arg(long, conflicts_with = "labels")]
        prescription: bool,
        /// A nitrogen-rate trial: six N rates (0-200 kg N/ha) on a known quadratic-plateau
        /// response with grain and N prices (truth.json gives the true optimum rate).
        #[arg(long, conflicts_with = "strips")]
        rates: bool,
        /// With --rates: each record logs the spreader's as-applied N rate (N120
        /// under-applied by 15 %), and the yields respond to the applied rates.
        #[arg(long, requires = "rates")]
        applied: bool,
    },
    /// Take a harvest's exports from an inbox: match each to the trials its points fall in,
    /// copy it there, and rerun only the trials that got something new.
    Intake {
        /// Folder of monitor exports (any monitor format plotsieve reads: delimited text,
        /// zipped ISO 11783-10 task data, ...); nothing in it is modified, moved or deleted.
        inbox: PathBuf,
        /// Season file listing the trials ([[trial]] file = ..., out = ...).
        season: PathBuf,
    },
    /// Fit the products across every trial of a season (two-stage: each trial's adjusted
    /// contrasts, then products x fields) and write the season's tables and report.
    Season {
        /// Season file listing the trials ([[trial]] file = ..., out = ...); each trial must
        /// have been run into its `out` folder.
        season: PathBuf,
        /// Fit nothing: remove the season folder (under its lock), so that it cannot be
        /// taken for the result of trials that have changed or failed since (a workflow
        /// engine calls this when a trial job fails).
        #[arg(long)]
        withdraw: bool,
    },
}

fn main() -> ExitCode {
    // Output piped into a program that stops reading (`plotsieve check ... | head`) ends
    // this one quietly, as command-line tools do, instead of a panic on the closed pipe.
    #[cfg(unix)]
    // SAFETY: restoring the default action of one signal before any thread is started.
    unsafe {
        libc::signal(libc::SIGPIPE, libc::SIG_DFL);
    }
    // glibc's allocator raises its threshold for giving blocks their own mapping as large
    // blocks are freed, so the per-export work tables of the parallel stages end up in the
    // threads' heaps and stay resident after they are freed (measured: about 400 MB of the
    // clean stage's 1.1 GB on a 2 M-point harvest). A fixed threshold of 1 MiB returns such
    // blocks to the system when they are freed; results do not depend on it.
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    // SAFETY: an allocator setting, made before any thread is started.
    unsafe {
        libc::mallopt(libc::M_MMAP_THRESHOLD, 1 << 20);
    }
    let cli = Cli::parse();
    let result = match cli.command {
        Command::Run { trial, out, set } => run::run_all(&trial, out, &set, cli.quiet),
        Command::Stage {
            name,
            trial,
            out,
            set,
        } => run::run_one(name, &trial, out, &set, cli.quiet),
        Command::Check { trial, set } => check::check(&trial, &set),
        Command::Inputs { trial } => trial::load(&trial, &[])
            .and_then(|t| trial::input_paths(&t))
            .map(|paths| {
                for p in paths {
                    println!("{}", p.display());
                }
            }),
        Command::Intake { inbox, season } => intake::intake(&inbox, &season, cli.quiet),
        Command::Season { season, withdraw } => {
            if withdraw {
                season::withdraw(&season)
            } else {
                season::season(&season, cli.quiet)
            }
        }
        Command::Simulate {
            dir,
            seed,
            fields,
            blocks,
            plot_length,
            effect_scale,
            trend_sd,
            flow_delay,
            origin_lon,
            origin_lat,
            strips,
            point_noise,
            form,
            interval_s,
            labels,
            prescription,
            rates,
            applied,
        } => match simulate::SimForm::from_name(&form) {
            None => Err(anyhow::anyhow!(
                "--form {}",
                plotsieve_stages::choice::refusal(simulate::SimForm::NAMES, &form)
            )),
            Some(_) if !(5.0..=1000.0).contains(&plot_length) => Err(anyhow::anyhow!(
                "--plot-length {plot_length}: expected 5-1000 metres"
            )),
            Some(
                simulate::SimForm::TaskData
                | simulate::SimForm::GeoPackage
                | simulate::SimForm::Shapefile,
            ) if applied => Err(anyhow::anyhow!(
                "--applied goes with the text, distance_text and yield_points forms (the layer and task-data writers write no empty rate cell)"
            )),
            Some(simulate::SimForm::TaskData) if labels => Err(anyhow::anyhow!(
                "--labels goes with the text, distance_text, yield_points, geopackage and shapefile forms (task data carries no label column)"
            )),
            Some(form) => simulate_files::simulate(
                &dir,
                &simulate::SimOptions {
                    seed,
                    fields,
                    blocks,
                    plot_length_m: plot_length,
                    effect_scale,
                    trend_sd_kg_ha: trend_sd,
                    flow_delay_s: flow_delay,
                    origin_lon,
                    origin_lat,
                    strips,
                    point_noise_kg_ha: point_noise,
                    form,
                    interval_s,
                    labels,
                    prescription,
                    rates,
                    applied,
                    ..Default::default()
                },
            ),
        },
    };
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("error: {e:#}");
            ExitCode::from(1)
        }
    }
}

#[cfg(test)]
mod tests {
    use super::Cli;
    use clap::CommandFactory;

    #[test]
    fn every_argument_of_every_subcommand_is_described() {
        let cli = Cli::command();
        let mut missing = Vec::new();
        for sub in cli.get_subcommands() {
            assert!(
                sub.get_about().is_some(),
                "{} has no description",
                sub.get_name()
            );
            for a in sub.get_arguments() {
                if a.get_id() != "help" && a.get_help().is_none() && a.get_long_help().is_none() {
                    missing.push(format!("{} {}", sub.get_name(), a.get_id()));
                }
            }
        }
        assert!(missing.is_empty(), "arguments without help: {missing:?}");
    }
}
