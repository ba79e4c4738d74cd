//! Reading and writing the run folder's tables. Every write goes to a temporary file in the
//! same folder and is renamed into place, so a reader never sees half a table. Floats are
//! written with fixed decimals and tables in a fixed order, so the same inputs and settings
//! give the same bytes.
//!
//! Layout: `table` (one codec for every CSV table: columns named once, read back by header
//! name) and `tables` (the run folder's row types), `points` (Parquet point tables),
//! `plots` (GeoJSON plot layers and the analyst's plot table).

mod applied;
mod plots;
mod points;
pub mod table;
mod tables;

pub use applied::{read_plot_rates, write_plot_rates};
pub use plots::{plot_properties, write_plots_wgs84, write_projected_plots};
pub use points::{
    as_read_back, read_clean_points, read_map_points, read_points, write_clean_points,
    write_points, MapRecord,
};
pub use table::{for_each_row, read_table, write_table};

use anyhow::{anyhow, Context, Result};
use std::io::Write;
use std::path::Path;

/// Write bytes atomically: temporary file in the same folder, flushed, then renamed.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    write_atomic_with(path, |f| {
        f.write_all(bytes)?;
        Ok(())
    })
}

/// [`write_atomic`] for a writer that streams its output (nothing held whole in memory):
/// `write` fills the temporary file; on an error the temporary file is removed.
pub fn write_atomic_with(
    path: &Path,
    write: impl FnOnce(&mut std::io::BufWriter<std::fs::File>) -> Result<()>,
) -> Result<()> {
    let dir = path
        .parent()
        .ok_or_else(|| anyhow!("{} has no parent folder", path.display()))?;
    std::fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))?;
    let name = path.file_name().and_then(|n| n.to_str()).unwrap_or("out");
    let tmp = dir.join(format!(".{name}.{}.tmp", std::process::id()));
    let written = (|| -> Result<()> {
        let f =
            std::fs::File::create(&tmp).with_context(|| format!("creating {}", tmp.display()))?;
        let mut w = std::io::BufWriter::with_capacity(1 << 20, f);
        write(&mut w).with_context(|| format!("writing {}", tmp.display()))?;
        let f = w
            .into_inner()
            .map_err(|e| anyhow!("writing {}: {}", tmp.display(), e.error()))?;
        f.sync_all().ok();
        Ok(())
    })();
    if let Err(e) = written {
        let _ = std::fs::remove_file(&tmp);
        return Err(e);
    }
    std::fs::rename(&tmp, path)
        .with_context(|| format!("renaming {} to {}", tmp.display(), path.display()))?;
    Ok(())
}

/// JSON, pretty, newline-terminated, atomically.
pub fn write_json<T: serde::Serialize>(path: &Path, v: &T) -> Result<()> {
    let mut s = serde_json::to_string_pretty(v)?;
    s.push('\n');
    write_atomic(path, s.as_bytes())
}
