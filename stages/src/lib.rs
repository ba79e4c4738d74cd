//! plotsieve's stages as a library: each stage takes typed input and settings and returns
//! typed output with its rejections, with no knowledge of the command line or the run
//! folder. Stage order: [`ingest`] -> [`clean`] -> [`plots`] -> [`adjust`] -> [`report`].
//! [`simulate`] invents complete trials with known truth for tests and demos.

pub mod adjust;
pub mod choice;
pub mod clean;
pub mod config;
pub mod crop;
pub mod defaults;
pub mod ingest;
pub mod plots;
pub mod progress;
pub mod projection;
pub mod report;
pub mod season;
pub mod simulate;
pub mod table;
pub mod util;
