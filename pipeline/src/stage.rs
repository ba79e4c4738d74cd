//! The stage list: registered once, it drives `run`, `stage`, help text and folder names.

use clap::ValueEnum;

/// The stages in order.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, ValueEnum)]
pub enum Stage {
    /// Read exports, plot boundaries and design; project to UTM.
    Ingest,
    /// Yield at standard moisture; remove monitor artifacts.
    Clean,
    /// Join points to plots; plot statistics.
    Plots,
    /// Spatial GP adjustment and treatment contrasts.
    Adjust,
    /// The reports: report.md (Markdown) and report.html (self-contained, with maps).
    Report,
}

impl Stage {
    /// Every stage, in run order.
    pub const ALL: [Stage; 5] = [
        Stage::Ingest,
        Stage::Clean,
        Stage::Plots,
        Stage::Adjust,
        Stage::Report,
    ];

    /// Lower-case name, as on the command line and in the manifest.
    pub fn name(self) -> &'static str {
        match self {
            Stage::Ingest => "ingest",
            Stage::Clean => "clean",
            Stage::Plots => "plots",
            Stage::Adjust => "adjust",
            Stage::Report => "report",
        }
    }

    /// Position in the run order, from 1.
    pub fn number(self) -> usize {
        Stage::ALL.iter().position(|s| *s == self).expect("listed") + 1
    }

    /// Output folder name inside the run folder, e.g. `2-clean`.
    pub fn dir(self) -> String {
        format!("{}-{}", self.number(), self.name())
    }

    /// The stage before this one.
    pub fn previous(self) -> Option<Stage> {
        self.number().checked_sub(2).map(|i| Stage::ALL[i])
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn folders_follow_order() {
        let dirs: Vec<String> = Stage::ALL.iter().map(|s| s.dir()).collect();
        assert_eq!(
            dirs,
            ["1-ingest", "2-clean", "3-plots", "4-adjust", "5-report"]
        );
        assert_eq!(Stage::Plots.previous(), Some(Stage::Clean));
        assert_eq!(Stage::Ingest.previous(), None);
    }
}
