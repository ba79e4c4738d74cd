//! Integration tests: the real `plotsieve` binary in fresh temporary folders, on
//! `sample-input/` and on small inputs the tests write themselves.
//!
//! One test binary, split by area; `common` holds the shared work-folder helpers.

mod common;

mod adjust;
mod applied_rates;
mod calibration;
mod catalogue;
mod cleaning;
mod forms;
mod geometry;
mod house;
mod inputs;
mod intake;
mod limits;
mod open_data;
mod open_data_rates;
mod plot_layers;
mod priors;
mod rates;
mod report;
mod run_folder;
mod season;
mod settings;
mod strips;
mod warnings;
mod workflow;
